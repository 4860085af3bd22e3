"""The stylesheet of the static duplicate report, inlined into the page (it loads nothing).

The colours are those of the search page (web/static/style.css). What stays and what would move is said
in words and shown by shape: the file that stays is a wide card under a heavy ink rule, with its picture
beside the facts; each file that would move is a narrow card with a dashed edge. No colour carries a
decision on its own.
"""

STYLE = """
:root { --paper: #f5f3ee; --surface: #ffffff; --surface-sunk: #ebe7de; --ink: #1c2226; --ink-soft: #4b555c;
  --line: #d6d0c4; --line-strong: #a9a294; --accent-dark: #1d4740; --note: #fbf3df; --note-line: #dcc58c;
  --error: #8f1d1d; --radius: 6px; --shadow: 0 1px 2px rgba(28, 34, 38, 0.08), 0 2px 8px rgba(28, 34, 38, 0.05);
  --sans: system-ui, -apple-system, "Liberation Sans", "DejaVu Sans", sans-serif;
  --serif: ui-serif, Georgia, "DejaVu Serif", serif; --mono: ui-monospace, "DejaVu Sans Mono", monospace; }
*, *::before, *::after { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink); font: 0.9375rem/1.5 var(--sans); }
header, main, footer { max-width: 72rem; margin: 0 auto; padding: 0 1.25rem; }
header { padding-top: 1.25rem; }
h1, h2, h3 { font-family: var(--serif); font-weight: 600; line-height: 1.25; margin: 0 0 0.5rem; }
h1 { font-size: 1.5rem; }
h2 { font-size: 1.15rem; }
p { margin: 0 0 0.5rem; }
code { font-family: var(--mono); font-size: 0.85em; }
.summary { color: var(--ink-soft); max-width: 60rem; }
.notes { list-style: none; margin: 0.75rem 0 0.5rem; padding: 0.6rem 1rem; display: grid; gap: 0.3rem;
  background: var(--note); border: 1px solid var(--note-line); border-radius: var(--radius); font-size: 0.875rem; }
.group { background: var(--surface); border: 1px solid var(--line); border-radius: var(--radius);
  box-shadow: var(--shadow); margin: 1.25rem 0; padding: 0.9rem 1rem 1rem; }
.group > h2 .kind { font-family: var(--sans); font-size: 0.9rem; font-weight: 400; color: var(--ink-soft); }
.files { list-style: none; margin: 0 0 0.7rem; padding: 0; display: grid; gap: 0.9rem; align-items: start;
  grid-template-columns: repeat(auto-fill, minmax(13rem, 1fr)); }
.file { min-width: 0; padding: 0.55rem 0.65rem 0.65rem; border: 1px solid var(--line-strong);
  border-radius: var(--radius); background: var(--paper); font-size: 0.8rem; }
.file.stays { grid-column: span 2; display: grid; grid-template-columns: 11.5rem minmax(0, 1fr); gap: 0.35rem 0.9rem;
  align-content: start; border-top: 6px solid var(--ink); background: var(--surface); }
.file.stays .decision { grid-column: 1 / -1; }
.file.moves { border-style: dashed; }
.file.left { border-style: dotted; background: var(--surface-sunk); }
.decision { margin: 0 0 0.35rem; font-size: 0.9rem; font-weight: 700; }
.moves .decision { font-weight: 600; color: var(--ink-soft); }
.thumb { display: flex; align-items: center; justify-content: center; height: 11.5rem; line-height: 0;
  background: var(--surface-sunk); border-radius: 3px; overflow: hidden; }
.thumb img { max-width: 100%; max-height: 100%; }
.unreadable { padding: 0.5rem; line-height: 1.4; color: var(--error); }
.name { margin: 0.35rem 0 0; font-weight: 600; font-size: 0.85rem; }
.stays .name { margin-top: 0; }
.name, .folder, td { overflow-wrap: normal; word-break: normal; hyphens: none; }
.cut { white-space: nowrap; }
.folder { margin: 0; color: var(--ink-soft); }
.facts { display: grid; grid-template-columns: auto minmax(0, 1fr); gap: 0 0.6rem; margin: 0.3rem 0 0; }
.facts dt { color: var(--ink-soft); }
.facts dd { margin: 0; }
details { margin-top: 0.7rem; font-size: 0.85rem; }
summary { cursor: pointer; color: var(--accent-dark); }
table { border-collapse: collapse; margin-top: 0.3rem; }
th, td { padding: 0.15rem 0.9rem 0.15rem 0; text-align: left; vertical-align: top; }
th { color: var(--ink-soft); font-weight: 600; }
.more { font-weight: 600; }
.method { margin: 2rem 0 0; padding-top: 1rem; border-top: 1px solid var(--line-strong); max-width: 60rem;
  font-size: 0.875rem; }
.method dl { display: grid; grid-template-columns: minmax(7rem, 10rem) minmax(0, 1fr); gap: 0.3rem 1rem; margin: 0; }
.method dt { font-weight: 600; }
.method dd { margin: 0; }
footer { margin: 1.5rem auto 0; padding-bottom: 2rem; color: var(--ink-soft); font-size: 0.8rem; }
@media (max-width: 30rem) {
  .file.stays { grid-column: auto; grid-template-columns: minmax(0, 1fr); }
  .method dl { grid-template-columns: minmax(0, 1fr); }
}
"""
