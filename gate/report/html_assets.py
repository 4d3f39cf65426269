"""The HTML report's inline style sheet and script (no external files, fonts or scripts).

Two palettes of our own, picked by ``prefers-color-scheme``; the charts use the
same custom properties (``--rg-*``), so they follow the theme too. The base and
head markers have colours no energy component uses. The script
only makes tables sortable; without it every table is a plain table.
"""

from __future__ import annotations

import base64
import hashlib

CSS = """
:root{color-scheme:light dark;
--rg-paper:#f7f5f0;--rg-panel:#fffdf8;--rg-ink:#1d232b;--rg-muted:#5b6570;--rg-grid:#e3dfd5;
--rg-line:#d6d0c3;--rg-head:#1f7a8c;--rg-base:#c2703d;--rg-roof:#3d3a7a;--rg-ridge:#b8336a;
--rg-pass:#2f7d4f;--rg-fail:#b3261e;--rg-warn:#8f5b00;--rg-waived:#6b5ca5;--rg-better:#2f7d4f;
--rg-worse:#b3261e;--rg-e-mac:#6a4c93;--rg-e-buffer:#8ab17d;--rg-e-noc:#e0b84c;
--rg-e-dram-param:#4a6fa5;--rg-e-dram-act:#b56576;--rg-e-static:#9aa0a6}
@media (prefers-color-scheme:dark){:root{
--rg-paper:#14171b;--rg-panel:#1b1f24;--rg-ink:#e8e4dc;--rg-muted:#9aa3ad;--rg-grid:#2c3239;
--rg-line:#353c44;--rg-head:#5cc2d3;--rg-base:#eb9a63;--rg-roof:#aaa5f2;--rg-ridge:#f27aa9;
--rg-pass:#6fcf97;--rg-fail:#ff8a80;--rg-warn:#f2c14e;--rg-waived:#b6a8f0;--rg-better:#6fcf97;
--rg-worse:#ff8a80;--rg-e-mac:#a98bd6;--rg-e-buffer:#9cc98f;--rg-e-noc:#e8c878;
--rg-e-dram-param:#7f9fd4;--rg-e-dram-act:#d891a1;--rg-e-static:#6f7780}}
*{box-sizing:border-box}
body{margin:0;background:var(--rg-paper);color:var(--rg-ink);
font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans",sans-serif}
main{max-width:1200px;margin:0 auto;padding:1.5rem 1.25rem 3rem}
header.top{border-bottom:3px solid var(--rg-roof);padding-bottom:.9rem;margin-bottom:1.4rem}
.brand{font-weight:700;letter-spacing:.04em;color:var(--rg-roof);font-size:.85rem;
text-transform:uppercase}
h1{font-size:1.6rem;margin:.2rem 0 .4rem}h2{font-size:1.25rem;margin:0 0 .3rem}
h3{font-size:1rem;margin:1.4rem 0 .5rem;color:var(--rg-muted);text-transform:uppercase;
letter-spacing:.05em}
.sub,.note,figcaption{color:var(--rg-muted);font-size:.88rem}
section.card{background:var(--rg-panel);border:1px solid var(--rg-line);border-radius:10px;
padding:1.1rem 1.25rem;margin:0 0 1.5rem;border-left:6px solid var(--rg-line)}
section.card.st-fail{border-left-color:var(--rg-fail)}
section.card.st-pass{border-left-color:var(--rg-pass)}
.chip{display:inline-block;padding:.05rem .55rem;border-radius:999px;font-size:.78rem;
font-weight:700;border:1.5px solid currentColor;white-space:nowrap}
.v-fail{color:var(--rg-fail)}.v-pass{color:var(--rg-pass)}.v-warn{color:var(--rg-warn)}
.v-waived{color:var(--rg-waived)}.v-error{color:var(--rg-fail)}.v-none{color:var(--rg-muted)}
.better{color:var(--rg-better)}.worse{color:var(--rg-worse)}.same{color:var(--rg-muted)}
.figures{display:grid;grid-template-columns:repeat(auto-fill,minmax(170px,1fr));gap:.6rem;
margin:.8rem 0}
.figure{border:1px solid var(--rg-line);border-radius:8px;padding:.45rem .7rem}
.figure .k{font-size:.75rem;color:var(--rg-muted)}.figure .v{font-size:1.1rem;font-weight:650}
.figure .d{font-size:.78rem}
figure{margin:.6rem 0 1rem}svg.chart{width:100%;height:auto;display:block}
svg.chart[data-chart=roofline]{max-width:940px}
.table-wrap{overflow-x:auto;border:1px solid var(--rg-line);border-radius:8px}
.table-wrap.scroll{max-height:34rem;overflow-y:auto}
tr.flagged td{background:color-mix(in srgb,var(--rg-fail) 12%,transparent)}
tr.finding.failing td{color:var(--rg-ink)}
section.card.st-warn{border-left-color:var(--rg-warn)}
#blocking ol{margin:.4rem 0;padding-left:1.4rem}#blocking li{margin:.25rem 0}
#blocking p.lead{font-weight:700;margin:.8rem 0 .2rem}
table{border-collapse:collapse;width:100%;font-size:.84rem}
th,td{padding:.3rem .55rem;border-bottom:1px solid var(--rg-grid);text-align:left;
vertical-align:top}
td.name{min-width:11rem}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
thead th{position:sticky;top:0;background:var(--rg-panel);border-bottom:2px solid var(--rg-line)}
th button{all:unset;cursor:pointer;font-weight:700}
th button:focus-visible{outline:2px solid var(--rg-roof)}
th[aria-sort=ascending] button::after{content:" \\2191"}
th[aria-sort=descending] button::after{content:" \\2193"}
tr.finding td{border-bottom:none;padding-top:0;font-size:.8rem;color:var(--rg-muted)}
code,.name{font-family:ui-monospace,"Cascadia Mono","DejaVu Sans Mono",monospace;
font-size:.82rem}.name,.model{overflow-wrap:anywhere}td code{white-space:nowrap}
a{color:var(--rg-roof)}ul.plain{margin:.3rem 0;padding-left:1.2rem}
footer{color:var(--rg-muted);font-size:.8rem;margin-top:2rem}
"""

# Makes every ``table.sortable`` sortable by any column (numbers by ``data-v``).
SCRIPT = """
(function(){
function key(td){var v=td.getAttribute("data-v");
if(v!==null&&v!==""&&!isNaN(Number(v)))return Number(v);return td.textContent.trim().toLowerCase();}
function sortBy(table,th,i){var asc=th.getAttribute("aria-sort")!=="ascending";
table.querySelectorAll("thead th").forEach(function(o){o.removeAttribute("aria-sort");});
th.setAttribute("aria-sort",asc?"ascending":"descending");
var body=table.tBodies[0],rows=Array.prototype.slice.call(body.rows);
rows.sort(function(a,b){var x=key(a.cells[i]),y=key(b.cells[i]);
var c=(typeof x==="number"&&typeof y==="number")?x-y:String(x).localeCompare(String(y));
return asc?c:-c;});
rows.forEach(function(r){body.appendChild(r);});}
document.querySelectorAll("table.sortable").forEach(function(table){
table.querySelectorAll("thead th").forEach(function(th,i){
var b=document.createElement("button");b.type="button";b.textContent=th.textContent;
b.title="sort by this column";th.textContent="";th.appendChild(b);
b.addEventListener("click",function(){sortBy(table,th,i);});});});
})();
"""


def script_hash() -> str:
    """The CSP source for ``SCRIPT`` (only this exact inline script may run)."""
    digest = hashlib.sha256(SCRIPT.encode("utf-8")).digest()
    return "'sha256-" + base64.b64encode(digest).decode("ascii") + "'"


CONTENT_SECURITY_POLICY = (
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
    f"script-src {script_hash()}; base-uri 'none'; form-action 'none'"
)
