#!/usr/bin/env bash
# Install a built roofgate wheel into a fresh venv and run it from outside the source tree,
# proving that everything it needs (built-in targets, policies, code) ships in the wheel.
#
# Usage: wheel-smoke.sh WHEEL
# Extra arguments for `python -m venv` and `pip install` come from ROOFGATE_SMOKE_VENV_ARGS and
# ROOFGATE_SMOKE_PIP_ARGS (the offline test uses --system-site-packages and --no-deps).
set -euo pipefail
[ $# -eq 1 ] && [ -f "$1" ] || { echo "usage: wheel-smoke.sh WHEEL" >&2; exit 2; }
wheel="$(cd "$(dirname "$1")" && pwd)/$(basename "$1")"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
read -r -a venv_args <<< "${ROOFGATE_SMOKE_VENV_ARGS:-}"
read -r -a pip_args <<< "${ROOFGATE_SMOKE_PIP_ARGS:-}"
python3 -m venv "${venv_args[@]}" "$work/venv"
"$work/venv/bin/python" -m pip install -q --disable-pip-version-check "${pip_args[@]}" "$wheel"
cd "$work"
where="$("$work/venv/bin/python" -c 'import gate; print(gate.__file__)')"
case "$where" in
  "$work/venv/"*) ;;
  *) echo "roofgate was imported from $where, not from the wheel's venv" >&2; exit 1 ;;
esac
export PATH="$work/venv/bin:$PATH"
roofgate --version
roofgate demo --keep demo
echo "wheel smoke test passed: roofgate demo ran from $where"
