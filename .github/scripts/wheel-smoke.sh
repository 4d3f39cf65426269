#!/usr/bin/env bash
# Install a built roofgate wheel into a fresh venv and run it from outside the source tree,
# proving that everything it needs (code, built-in targets and policies) ships in the wheel:
# `roofgate demo`, `roofgate check -p default` on the demo's repository, `roofgate init`.
#
# Usage: wheel-smoke.sh WHEEL
# Extra arguments for `python -m venv` and `pip install` come from ROOFGATE_SMOKE_VENV_ARGS and
# ROOFGATE_SMOKE_PIP_ARGS (the offline test uses --system-site-packages and --no-deps); PYTHON
# names the interpreter that creates the venv (default python3).
set -euo pipefail
[ $# -eq 1 ] && [ -f "$1" ] || { echo "usage: wheel-smoke.sh WHEEL" >&2; exit 2; }
wheel="$(cd "$(dirname "$1")" && pwd)/$(basename "$1")"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
read -r -a venv_args <<< "${ROOFGATE_SMOKE_VENV_ARGS:-}"
read -r -a pip_args <<< "${ROOFGATE_SMOKE_PIP_ARGS:-}"
"${PYTHON:-python3}" -m venv "${venv_args[@]}" "$work/venv"
"$work/venv/bin/python" -m pip install -q --disable-pip-version-check "${pip_args[@]}" "$wheel"
cd "$work"
where="$("$work/venv/bin/python" -c 'import gate; print(gate.__file__)')"
case "$where" in
  "$work/venv/"*) ;;
  *) echo "roofgate was imported from $where, not from the wheel's venv" >&2; exit 1 ;;
esac
export PATH="$work/venv/bin:$PATH"
roofgate --version
roofgate targets > /dev/null
roofgate demo --keep demo

# The built-in policy by name, on the demo's pull-request branch: the widened layer must fail
# the default policy's params-fit-buffer rule (exit 1), and nothing else may go wrong.
cd demo/fernhollow-models
set +e
roofgate check --base main -p default -t ws-64x64-4mib --junit smoke/junit.xml > smoke.log 2>&1
code=$?
set -e
cat smoke.log
if [ "$code" -ne 1 ] || ! grep -q 'params-fit-buffer' smoke/junit.xml; then
  echo "expected exit 1 with a params-fit-buffer failure from -p default, got exit $code" >&2
  exit 1
fi

# `roofgate init --workflows` in a fresh repository: the policy and workflow templates ship too.
mkdir "$work/fresh"
cp -R models "$work/fresh/models"
cd "$work/fresh"
git init -q -b main
set +e
roofgate init --workflows --dim seq=64 > init.log 2>&1
code=$?
set -e
# The demo's branch widened a layer past the buffer: the first run fails it (exit 1) on purpose.
[ "$code" -le 1 ] || { cat init.log; echo "roofgate init exited $code" >&2; exit 1; }
for file in roofgate.yaml policies/roofgate.yaml .github/workflows/roofgate-pr.yml; do
  [ -s "$file" ] || { echo "roofgate init wrote no $file" >&2; exit 1; }
done
echo "wheel smoke test passed: roofgate demo, check -p default and init ran from $where"
