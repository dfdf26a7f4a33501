"""The HTML report's stylesheet, inlined into the page (no external resources)."""

CSS = """
:root { color-scheme: light; --ink: #1d232a; --mute: #5b6670; --rule: #cfd6dc;
  --ok: #1f6f43; --fail: #a3122e; --kink: #2b6f8f; --unsure: #7a5a00; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink);
  margin: 0 auto; max-width: 1200px; padding: 16px 24px 48px; background: #fff; }
h1 { font-size: 22px; margin: 8px 0; }
h2 { font-size: 18px; margin: 32px 0 6px; padding-top: 12px; border-top: 2px solid var(--rule);
  font-family: ui-monospace, "DejaVu Sans Mono", monospace; overflow-wrap: anywhere; }
h3 { font-size: 15px; margin: 18px 0 6px; }
code, .name, .idx, .n { font-family: ui-monospace, "DejaVu Sans Mono", monospace; }
.verdict { font-weight: 700; font-size: 16px; padding: 6px 10px; border-left: 6px solid; }
.gp-ok.verdict { color: var(--ok); border-color: var(--ok); background: #eef7f1; }
.gp-fail.verdict { color: var(--fail); border-color: var(--fail); background: #fbeef0; }
dl.settings { display: flex; flex-wrap: wrap; gap: 2px 6px; margin: 8px 0; }
dl.settings dt { color: var(--mute); }
dl.settings dd { margin: 0 14px 0 0; overflow-wrap: anywhere; font-weight: 600; }
header dl.settings { display: grid; grid-template-columns: max-content 1fr; }
table { border-collapse: collapse; margin: 4px 0 12px; }
th, td { text-align: left; vertical-align: top; padding: 3px 10px 3px 0;
  border-bottom: 1px solid var(--rule); }
thead th { color: var(--mute); font-weight: 600; white-space: nowrap; }
td.n { text-align: right; white-space: nowrap; }
td.idx, th.name, td:nth-child(2) { white-space: nowrap; }
td.why ul { margin: 0; padding-left: 16px; }
td.why { max-width: 520px; }
.status { font-weight: 700; padding: 0 4px; border: 1px solid; border-radius: 3px; }
tr.gp-fail .status { color: var(--fail); }
tr.gp-pass .status, tr.gp-ok .status { color: var(--ok); }
tr.gp-kink .status { color: var(--kink); }
tr.gp-inconclusive .status { color: var(--unsure); }
tr.gp-fail th { font-weight: 700; }
td.gp-regressed .change, td.gp-worse .change { color: var(--fail); font-weight: 700; }
td.gp-better .change { color: var(--ok); }
.own, .note { color: var(--mute); font-weight: 400; }
.error { color: var(--fail); }
.enters { font-size: 15px; }
figure.gp-figure { margin: 12px 0 20px; break-inside: avoid; page-break-inside: avoid; }
figure.gp-figure figcaption { margin-bottom: 6px; max-width: 900px; }
svg.gp-map { display: block; max-width: 100%; height: auto; border: 1px solid #8a949c; }
svg.gp-legend text { font-family: system-ui, sans-serif; fill: var(--ink); }
@media print {
  body { max-width: none; padding: 0; font-size: 11px; }
  * { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  a { color: inherit; text-decoration: none; }
  section.target { break-before: page; }
  section.target:first-of-type { break-before: auto; }
}
"""
