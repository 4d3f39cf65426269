#!/usr/bin/env bash
# Step 2 of the composite action (action.yml): fetch the Git LFS objects of the MERGE BASE
# (the commit `roofgate check` reads the base side from; not the base branch's tip), when that
# commit tracks anything with LFS in any of its .gitattributes files (nested ones too).
# The server is GITHUB_SERVER_URL (github.com or a GitHub Enterprise Server); the read-only
# job token goes through environment-only git config: never written to .git/config, never on
# a command line. Anything missing is left for `roofgate check`, which names the fix.
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
base="$(bash "$here/base-ref.sh")" || exit 0  # the check step reports the missing base
if ! merge_base="$(git merge-base "$base" HEAD 2>/dev/null)"; then
  echo "roofgate: no merge base of $base and HEAD yet; the check step explains what to fetch"
  exit 0
fi
if ! git grep -q -I -e 'filter=lfs' "$merge_base" -- ':(glob)**/.gitattributes'; then
  echo "roofgate: the merge base ${merge_base:0:12} tracks nothing with Git LFS; nothing to fetch"
  exit 0
fi
if ! git lfs version > /dev/null 2>&1; then
  echo "::warning title=roofgate::the merge base uses Git LFS but git-lfs is not installed;" \
       "install it before this step so the base side's models can be read"
  exit 0
fi
server="${GITHUB_SERVER_URL:-https://github.com}"
if [ -n "${ROOFGATE_TOKEN:-}" ]; then
  export GIT_CONFIG_COUNT=1
  export GIT_CONFIG_KEY_0="http.${server}/.extraheader"
  GIT_CONFIG_VALUE_0="AUTHORIZATION: basic $(printf 'x-access-token:%s' "$ROOFGATE_TOKEN" | base64 -w0)"
  export GIT_CONFIG_VALUE_0
fi
echo "roofgate: fetching the Git LFS objects of the merge base ${merge_base:0:12} from ${server}"
git lfs fetch origin "$merge_base"
