#!/usr/bin/env bash
# Prints the revision `roofgate check` compares with, for the composite action (action.yml):
# the `base` input; else, in a merge queue, the merge group's base commit; else, on a pull
# request, origin/<the base branch>. Without any of these it says what to set and exits 2.
set -euo pipefail
if [ -n "${ROOFGATE_BASE:-}" ]; then
  printf '%s\n' "$ROOFGATE_BASE"
elif [ -n "${ROOFGATE_MERGE_GROUP_BASE:-}" ]; then
  printf '%s\n' "$ROOFGATE_MERGE_GROUP_BASE"
elif [ -n "${GITHUB_BASE_REF:-}" ]; then
  printf 'origin/%s\n' "$GITHUB_BASE_REF"
else
  echo "::error title=roofgate::no base to compare with: this is not a pull request or merge" \
       "queue run, so set the action's base input (e.g. base: origin/main)" >&2
  exit 2
fi
