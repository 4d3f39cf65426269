"""Regenerate the report golden files from realistic runs, not hand-made verdicts.

Two runs, both on the fictional demo repository that ``roofgate demo`` builds:

* ``demo``: the demo's pull request (``roofgate check --base main``);
* ``audit``: a sharded nightly audit of the same repository on the pull-request
  branch against a snapshot of ``main`` (``audit --snapshot`` on main, then
  ``audit --shard 1/2`` and ``2/2`` with ``--baseline``, then ``merge``).

Each run's JSON result is stored (``<run>_result.json``) and every text report is
rendered from it (``<run>.md``, ``.junit.xml``, ``.terminal.txt``, ``.sarif.json``,
``.annotations.txt``, and the demo's page ``demo.html``); tests/test_report_golden.py
renders the stored results again and compares. Run from the repository root after an intended change, then review
``git diff tests/golden/``::

    PYTHONPATH=. python3 tests/golden/regenerate.py
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
RUNS = ("demo", "audit")
HTML_RUNS = ("demo",)  # the page of one realistic run (the audit's would repeat its layout)


def _roofgate(repo: Path, *args: str) -> None:
    """Run the roofgate CLI in ``repo``; exit 1 (a rule failed) is expected, 2 or 3 is not."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    done = subprocess.run([sys.executable, "-c", "from gate.cli import main; main()", *args],
                          cwd=repo, env=env, capture_output=True, text=True, check=False)
    if done.returncode not in (0, 1):
        raise SystemExit(f"roofgate {' '.join(args)} exited {done.returncode}:\n{done.stderr}")


def _git(repo: Path, *args: str) -> None:
    subprocess.run(["git", "-c", "core.hooksPath=/dev/null", *args], cwd=repo, check=True,
                   capture_output=True)


def realistic_results(work: Path) -> dict[str, Path]:
    """Build the demo repository in ``work`` and run both scenarios; run name -> result JSON."""
    from gate.demo import BRANCH, REPO_DIR, run_demo

    run_demo(str(work / "demo"), echo=lambda _line: None)
    repo = work / "demo" / REPO_DIR
    # keep the demo's result: the audits below write the config's reports to the same folder
    out = {"demo": Path(shutil.copyfile(repo / "roofgate-out" / "result.json",
                                        work / "demo.json"))}
    _git(repo, "checkout", "-q", "main")
    _roofgate(repo, "audit", "-j", "1", "--snapshot", str(work / "base.json"))
    _git(repo, "checkout", "-q", BRANCH)
    for shard in ("1/2", "2/2"):
        _roofgate(repo, "audit", "-j", "1", "--baseline", str(work / "base.json"),
                  "--shard", shard, "--shard-out", str(work / f"shard-{shard[0]}.json"))
    _roofgate(repo, "merge", str(work / "shard-1.json"), str(work / "shard-2.json"),
              "--json", str(work / "audit.json"))
    out["audit"] = work / "audit.json"
    return out


def render_all(name: str, result_path: Path) -> dict[str, str]:
    """Every text report of the stored result ``result_path``: file name -> text."""
    from gate.report import html, junit, markdown, sarif, terminal
    from gate.report.annotations import render as annotation_lines
    from gate.report.jsonout import read_result

    result = read_result(str(result_path))
    html_page = {f"{name}.html": html.render(result)} if name in HTML_RUNS else {}
    return {
        **html_page,
        f"{name}.md": markdown.render(result),
        f"{name}.junit.xml": junit.render(result),
        f"{name}.terminal.txt": terminal.render(result),
        f"{name}.sarif.json": json.dumps(sarif.sarif_log(result), indent=2,
                                         ensure_ascii=True) + "\n",
        f"{name}.annotations.txt": "".join(line + "\n" for line in annotation_lines(result)),
    }


def main() -> None:
    sys.path.insert(0, str(ROOT))
    with tempfile.TemporaryDirectory(prefix="roofgate-golden-") as tmp:
        for name, path in realistic_results(Path(tmp)).items():
            stored = HERE / f"{name}_result.json"
            shutil.copyfile(path, stored)
            for file_name, text in render_all(name, stored).items():
                (HERE / file_name).write_text(text, encoding="utf-8")
            print(f"wrote {stored.name} and its reports")


if __name__ == "__main__":
    main()
