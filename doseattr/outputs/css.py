"""Inline style sheet of the HTML report (plain, print-friendly, no web fonts)."""

CSS = """
:root { --ink: #1d1d1d; --muted: #5c5c5c; --rule: #d9d9d9; --accent: #0072B2;
        --warn-bg: #fff4e0; --warn-edge: #E69F00; --caution-bg: #f3f6fa; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.5 -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 940px; margin: 0 auto; padding: 24px 28px 48px; }
header { border-bottom: 3px solid var(--accent); margin-bottom: 8px; }
h1 { font-size: 26px; margin: 8px 0 4px; }
h2 { font-size: 20px; margin: 32px 0 8px; padding-bottom: 4px; border-bottom: 1px solid var(--rule); }
h3 { font-size: 16px; margin: 20px 0 6px; }
.meta { color: var(--muted); margin: 0 0 12px; font-size: 13px; }
p { margin: 8px 0; }
.scroll { overflow-x: auto; max-width: 100%; margin: 12px 0; }
.scroll > table { margin: 0; }
main { overflow-wrap: break-word; }
@media (max-width: 600px) { main { padding: 16px 12px 32px; } }
table { border-collapse: collapse; margin: 12px 0; font-size: 14px; }
caption { text-align: left; font-weight: 600; padding: 4px 0; }
th, td { padding: 4px 10px; border-bottom: 1px solid var(--rule); text-align: left;
         vertical-align: top; }
thead th { border-bottom: 2px solid #999; background: #fafafa; }
td { font-variant-numeric: tabular-nums; }
table.facts th { font-weight: 600; color: var(--muted); width: 42%; }
table.facts { width: 100%; }
table.key { width: 100%; font-size: 15px; }
table.key td:nth-child(n+2) { white-space: nowrap; font-weight: 600; }
figure { margin: 14px 0; }
figure img { max-width: 100%; height: auto; display: block; border: 1px solid #eee; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 4px; }
.warnings { background: var(--warn-bg); border-left: 5px solid var(--warn-edge);
            padding: 8px 14px; margin: 14px 0; }
.warnings p, .warnings ul { margin: 4px 0; }
.ok { color: var(--muted); }
.verdict { border-left: 5px solid var(--accent); background: var(--caution-bg);
           padding: 6px 12px; margin: 10px 0; font-weight: 600; }
.verdict.fail { border-left-color: var(--warn-edge); background: var(--warn-bg); }
.cautions { background: var(--caution-bg); border-left: 5px solid var(--accent);
            padding: 8px 14px; }
.cautions li { margin: 4px 0; }
.notes { color: var(--muted); font-size: 13.5px; }
.notes ul { margin: 6px 0; padding-left: 20px; }
ol.refs li { margin: 4px 0; }
@media print { main { max-width: none; padding: 0; } h2 { break-after: avoid; }
               figure, table { break-inside: avoid; } }
"""
