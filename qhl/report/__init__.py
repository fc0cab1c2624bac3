"""Shareable reports: one self-contained HTML file per command run (`--report FILE.html`).

`qhl.report.report` renders the dictionary a command prints with `--json` (the same dictionary:
nothing is computed again) through a jinja2 template (`templates/report.html.j2`, autoescaped),
with the plots the command can already draw embedded as base64 PNG, every assumption beside its
source, the command line and the versions of qhl and the libraries it rests on.

Imports: everything below it (base ... survey); jinja2 and matplotlib only when a report is written.
"""

from ..base.lazy import lazy_attributes

_PUBLIC = {"write_report": ".report", "render_report": ".report", "versions": ".report",
           "REPORT_COMMANDS": ".report"}
__all__ = list(_PUBLIC)
__getattr__, __dir__ = lazy_attributes(__name__, _PUBLIC)
