#!/usr/bin/env bash
# Step 3 of the composite action (action.yml): run `roofgate check` and record its exit code
# and report paths as step outputs. It always exits 0 itself: the action's last step exits
# with roofgate's code, after the job summary has been written.
set -uo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
out="${ROOFGATE_OUT:-roofgate-out}"
outputs="${GITHUB_OUTPUT:?the runner sets GITHUB_OUTPUT}"
mkdir -p -- "$out"
{
  echo "report-dir=$out"
  echo "junit=$out/junit.xml"
  echo "markdown=$out/summary.md"
  echo "json=$out/result.json"
} >> "$outputs"
if [ -n "${ROOFGATE_PR_NUMBER:-}" ]; then  # read by the comment workflow (validated there)
  printf '%s\n' "$ROOFGATE_PR_NUMBER" > "$out/pr-number.txt"
fi
if ! base="$(bash "$here/base-ref.sh")"; then
  echo "exit-code=2" >> "$outputs"
  exit 0
fi
args=(check --base "$base" --junit "$out/junit.xml" --markdown "$out/summary.md"
      --json "$out/result.json")
[ -n "${ROOFGATE_CONFIG:-}" ] && args+=(--config "$ROOFGATE_CONFIG")
add_lines() {  # one --flag per non-empty line of the input, surrounding spaces trimmed
  local flag="$1" line
  while IFS= read -r line; do
    line="${line#"${line%%[![:space:]]*}"}"
    line="${line%"${line##*[![:space:]]}"}"
    [ -n "$line" ] && args+=("$flag" "$line")
  done <<< "$2"
}
add_lines --policy "${ROOFGATE_POLICY:-}"
add_lines --target "${ROOFGATE_TARGET:-}"
[ "${ROOFGATE_ANNOTATIONS:-true}" = "true" ] && args+=(--annotations -)
roofgate "${args[@]}"
echo "exit-code=$?" >> "$outputs"
exit 0
