#!/usr/bin/env bash
# Step 1 of the composite action (action.yml): install roofgate from the action's own files
# (the commit pinned in `uses:`; nothing of roofgate comes from a package index) into a venv
# under RUNNER_TEMP, and put it on PATH for this job's later steps.
# ROOFGATE_VENV_ARGS and ROOFGATE_PIP_ARGS add arguments to `python -m venv` and
# `pip install` (the offline tests use --system-site-packages and --no-deps --no-index).
set -euo pipefail
source_dir="${GITHUB_ACTION_PATH:?the runner sets GITHUB_ACTION_PATH to the files of the action}"
venv="${RUNNER_TEMP:?the runner sets RUNNER_TEMP}/roofgate-venv"
read -r -a venv_args <<< "${ROOFGATE_VENV_ARGS:-}"
read -r -a pip_args <<< "${ROOFGATE_PIP_ARGS:-}"
"${ROOFGATE_PYTHON:-python3}" -m venv "${venv_args[@]}" "$venv"
"$venv/bin/python" -m pip install --quiet --disable-pip-version-check "${pip_args[@]}" \
  "$source_dir"
echo "$venv/bin" >> "${GITHUB_PATH:?the runner sets GITHUB_PATH}"
echo "scripts=$source_dir/.github/scripts" >> "${GITHUB_OUTPUT:?the runner sets GITHUB_OUTPUT}"
"$venv/bin/roofgate" --version
