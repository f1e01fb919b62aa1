"""The report's stylesheet, inlined into the page (no external fonts or files). Reads and writes nothing."""

CSS = """
:root { --ink: #1d2733; --muted: #5b6775; --line: #d8dee6; --accent: #1f5f99; --warn-bg: #fff4d6;
        --warn-line: #d9a400; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.5 system-ui, -apple-system, "Segoe UI", "DejaVu Sans", sans-serif;
       color: var(--ink); background: #f6f8fa; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 48px; background: #fff; }
h1 { font-size: 1.7em; margin: 0 0 4px; }
h2 { font-size: 1.3em; margin: 36px 0 10px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
h3 { font-size: 1.05em; margin: 22px 0 6px; color: var(--accent); }
.meta { color: var(--muted); margin: 0 0 12px; }
.caution { background: var(--warn-bg); border-left: 5px solid var(--warn-line); padding: 10px 14px;
           font-weight: 600; }
.note { color: var(--muted); font-size: 0.92em; }
nav { position: sticky; top: 0; background: #fff; padding: 8px 0; border-bottom: 1px solid var(--line);
      z-index: 1; }
nav a { margin-right: 18px; color: var(--accent); text-decoration: none; font-weight: 600; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 4px 18px; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; }
figure { margin: 16px 0; text-align: center; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: 0.9em; margin-top: 4px; }
table { border-collapse: collapse; margin: 12px 0 20px; font-size: 0.86em; width: 100%; }
caption { text-align: left; font-weight: 600; padding: 4px 0; }
th, td { padding: 4px 8px; border-bottom: 1px solid var(--line); text-align: left; vertical-align: top; }
th { background: #eef2f6; position: sticky; top: 40px; }
tbody tr:nth-child(even) { background: #fafbfc; }
td { font-variant-numeric: tabular-nums; }
table.provenance td:nth-child(6) { font-family: "DejaVu Sans Mono", monospace; font-size: 0.95em; }
code { background: #eef2f6; padding: 1px 4px; border-radius: 3px; }
footer { margin-top: 40px; }
"""
