"""style: the page's inline CSS and the fill patterns its charts refer to (no external resources)."""

STYLE = """
:root{--ink:#1d2327;--paper:#fbf9f4;--muted:#58606b;--rule:#d8d2c4;--panel:#ffffff;
--int8:#2a6b68;--float:#c9b27c;--over:#a4432b;--iso:#5a4a8a;--mark:#1d2327}
*{box-sizing:border-box}
html{-webkit-print-color-adjust:exact;print-color-adjust:exact}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.5 system-ui,-apple-system,"Segoe UI",
"DejaVu Sans",Roboto,sans-serif;font-variant-numeric:tabular-nums}
main{max-width:980px;margin:0 auto;padding:0 18px 48px}
header.top{border-left:10px solid var(--int8);padding:18px 18px 10px;margin:18px 0 8px;background:var(--panel)}
header.top h1{font-size:21px;margin:0 0 4px;word-break:break-all}
header.top p{margin:0;color:var(--muted)}
nav{margin:8px 0 4px;font-size:13px}
nav a{color:var(--ink);margin-right:14px;text-decoration:none;border-bottom:1px dotted var(--muted)}
section{overflow-x:auto;background:var(--panel);border-top:3px solid var(--ink);margin:22px 0;padding:6px 18px 14px}
h2{font-size:18px;margin:10px 0 6px;letter-spacing:.01em}
h3{font-size:15px;margin:16px 0 6px}
p{margin:6px 0}
.headline{font-size:22px;font-weight:700;margin:6px 0 10px}
.headline .fail::before{content:"✗ "}.headline .pass::before{content:"✓ "}
.cards{display:flex;flex-wrap:wrap;gap:12px}
.card{flex:1 1 280px;border:1px solid var(--rule);padding:10px 12px;background:var(--paper)}
.card h3{margin:0 0 6px;display:flex;justify-content:space-between;gap:8px;align-items:baseline}
.badge{font-size:12px;font-weight:700;padding:1px 8px;border:2px solid var(--ink);white-space:nowrap}
.badge.ok{border-style:solid;color:var(--int8);border-color:var(--int8)}
.badge.ok::before{content:"✓ "}
.badge.bad{border-style:double;border-width:4px;color:var(--over);border-color:var(--over);text-transform:uppercase}
.badge.bad::before{content:"✗ "}
.badge.none{border-style:dotted}
.small{font-size:13px;color:var(--muted)}
.caution{border:1px dashed var(--ink);padding:8px 12px;margin:12px 0 4px;background:var(--paper)}
.caution strong::after{content:" "}
.note{border-left:4px solid var(--over);padding:4px 10px;background:var(--paper)}
.note::before{content:"Note: ";font-weight:700}
table{border-collapse:collapse;width:100%;font-size:13px;margin:6px 0}
th,td{text-align:left;padding:3px 8px;border-bottom:1px solid var(--rule);vertical-align:middle}
th{font-weight:600;border-bottom:2px solid var(--ink)}
td.num,th.num{text-align:right;white-space:nowrap}
th.num{white-space:normal}
tbody tr:nth-child(even){background:#f4f1ea}
td.name{word-break:break-word;min-width:7em}
.scroll{overflow-x:auto}
.scroll table{font-size:12px}
.scroll th,.scroll td{padding:3px 5px}
td.cost{min-width:11em;font-size:11.5px}
table.flashmap td{padding:1px 8px}
svg.chart{display:block;max-width:100%;height:auto;margin:6px 0}
svg.bars{display:block}
svg text{font:12px system-ui,"DejaVu Sans",sans-serif;fill:var(--ink)}
svg .tick{fill:var(--muted);font-size:11px}
.bar{fill:var(--int8)}
.bar.over{fill:url(#qf-over)}
.bar.peak{stroke:var(--mark);stroke-width:1.5}
.limit{stroke:var(--ink);stroke-width:1.5;stroke-dasharray:7 4}
.arena{stroke:var(--int8);stroke-width:1.2;stroke-dasharray:1.5 2.5}
.gauge-limit{fill:none;stroke:var(--ink);stroke-width:1;stroke-dasharray:3 2}
.gauge-used{fill:var(--int8)}
.gauge-used.over{fill:url(#qf-over);stroke:var(--over)}
.floatbar{fill:url(#qf-float);stroke:#8d7a4d;stroke-width:.6}
.int8bar{fill:var(--int8)}
.axis{stroke:var(--ink);stroke-width:1}
.grid{stroke:var(--rule);stroke-width:1}
.acc-line{fill:none;stroke:var(--int8);stroke-width:1.5}
.iso-line{fill:none;stroke:var(--iso);stroke-width:1.2;stroke-dasharray:4 3}
circle.acc{fill:var(--int8);stroke:var(--paper);stroke-width:.8}
circle.acc.float{fill:var(--paper);stroke:var(--int8);stroke-width:1.5}
rect.iso{fill:var(--iso)}
.guide{stroke:var(--over);stroke-width:1;stroke-dasharray:2 3}
.ring{fill:none;stroke:var(--over);stroke-width:1.6}
.letter{font-weight:700;fill:var(--over)}
.legend{display:flex;flex-wrap:wrap;gap:16px;font-size:12px;color:var(--muted);margin:2px 0 6px}
.legend span{display:inline-flex;align-items:center;gap:5px}
details{margin:8px 0}
summary{cursor:pointer;font-size:13px}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;font-size:13px;margin:6px 0}
dl.facts dt{color:var(--muted)}
dl.facts dd{margin:0;word-break:break-word}
footer{font-size:12px;color:var(--muted);margin-top:20px}
@media print{
 body{background:#fff;font-size:10.5pt}
 main{max-width:none;padding:0}
 nav,summary{display:none}
 section{border-top:2px solid #000;margin:10px 0;padding:4px 0;break-inside:auto}
 .card,figure,svg.chart,tr,.caution{break-inside:avoid}
 h2,h3{break-after:avoid}
 header.top{margin-top:0}
}
@page{margin:14mm}
"""

# Fill patterns are defined once; charts refer to them by id. Hatching keeps "over the limit" and
# "float32" legible in greyscale print.
PATTERNS = """<svg class="defs" width="0" height="0" style="position:absolute" aria-hidden="true"><defs>
<pattern id="qf-over" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">
<rect width="6" height="6" fill="#e9c7bb"></rect><rect width="2.6" height="6" fill="#a4432b"></rect></pattern>
<pattern id="qf-float" width="5" height="5" patternUnits="userSpaceOnUse" patternTransform="rotate(-45)">
<rect width="5" height="5" fill="#f3ead3"></rect><rect width="1.4" height="5" fill="#c9b27c"></rect></pattern>
</defs></svg>"""
