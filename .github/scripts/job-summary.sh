#!/usr/bin/env bash
# Appends a markdown report to the job summary, cut at a line boundary below GitHub's 1 MiB
# per-step limit with a note when longer. Usage: job-summary.sh REPORT.md
set -euo pipefail
file="${1:?usage: job-summary.sh REPORT.md}"
summary="${GITHUB_STEP_SUMMARY:?the runner sets GITHUB_STEP_SUMMARY}"
limit=1000000
if [ ! -f "$file" ]; then
  echo "roofgate wrote no report ($file); see the step's log." >> "$summary"
elif [ "$(wc -c < "$file")" -le "$limit" ]; then
  cat -- "$file" >> "$summary"
else
  { head -c "$limit" -- "$file" | sed '$d'
    printf '\n\n_Summary cut at the 1 MiB job-summary limit; the full report is in the uploaded artifact._\n'
  } >> "$summary"
fi
