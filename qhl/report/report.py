"""One self-contained HTML report of a command run, rendered from its `--json` dictionary.

The report holds: the command line, the date (UTC) and the versions of qhl, Python, numpy, scipy,
qiskit, qiskit-aer, matplotlib and jinja2; a summary table of the dictionary's plain values; one
section per structured value (nested tables); the plots the command can already draw, rendered to
PNG in memory and embedded as base64 `data:` URIs; every assumption with its source; and the
dictionary itself as JSON (a collapsible block and an embedded download link).

Content comes from the dictionary the command prints with `--json` (already converted to plain
JSON types by the caller) and from result objects the command already holds (a budget sweep, a fit
report, a scan's results file) for the plots: nothing is computed again. The template engine is
jinja2 with autoescaping on, so a cluster name or any other user string (a `<script>` tag in a
cluster file) is shown as text, never run (OWASP, Cross Site Scripting Prevention Cheat Sheet:
output encoding for the HTML context; common practice).
"""

from __future__ import annotations

import base64
import datetime
import io
import json
import math
import platform
import shlex
from pathlib import Path

__all__ = ["REPORT_COMMANDS", "COMMON_ASSUMPTIONS", "command_assumptions", "collect_assumptions", "versions",
           "png_base64", "render_report", "write_report"]

REPORT_COMMANDS = ("budget", "learn", "check", "scan", "design")

# distributions whose versions go into every report (qhl first)
VERSIONED = ("qhl", "numpy", "scipy", "qiskit", "qiskit-aer", "matplotlib", "jinja2")

# tables longer than this are cut in the page (the JSON data section holds everything): a budget
# sweep of 1000 x 1000 points would otherwise be millions of cells
MAX_ROWS = 500
MAX_CELLS = 2500

COMMON_ASSUMPTIONS = {
    "units": "parameters in Hz, times in seconds; H = 2 pi sum_n s_n h_n G_n in rad/s with spin operators "
             "I = sigma/2, qubit i = spin i (qhl's convention, DEVELOPERS.md)",
}


def command_assumptions(command: str) -> dict:
    """The model choices of `command` that its JSON does not already state, each with its source.

    The texts name the constants where the code keeps them (imported here, not retyped).
    """
    if command == "learn":
        return {
            "noise_model": "independent Gaussian noise of standard deviation sigma on Re and Im of every point; "
                           "the cost is the negative log-likelihood in nats (Kay, Fundamentals of Statistical "
                           "Signal Processing: Estimation Theory, 1993, ch. 3 and 15)",
            "stderr_hz": "Cramer-Rao standard errors sqrt(diag F^-1) from the Fisher information at the fit "
                         "(Cramer 1946; Rao 1945); infinite where the data do not determine a parameter",
            "goodness_of_fit": "2 x cost against a chi-square with N - P degrees of freedom (N real data values, "
                               "P free parameters); p < 1e-6 points to a local minimum or a wrong sigma "
                               "(Kay 1993, ch. 7)",
        }
    if command == "check":
        from ..emulation.check import Z_LIMIT
        return {
            "z": "z = (emulated - trotter_exact) / stderr: the emulated estimate against the exact value of the "
                 "same Trotterised circuit, in standard errors (common practice)",
            "verdict": f"PASS when every |z| < {Z_LIMIT:g}; INCONCLUSIVE when no row has power (common practice)",
        }
    if command == "scan":
        from ..survey.diagnostics import GOE_MEAN_R, POISSON_MEAN_R
        return {
            "mean_r": f"level-spacing ratio <r>: Poisson {POISSON_MEAN_R:.4f}, GOE {GOE_MEAN_R:.4f} "
                      "(Atas, Bogomolny, Giraud and Roux, PRL 110, 084101 (2013))",
            "plots": "each plotted point is the median over the clusters of one size at one dipolar scale; "
                     "eigenvalues <= 0 and infinite bounds are left out (qhl.survey.scan_plots)",
        }
    return {}


def collect_assumptions(command: str, data: dict) -> list:
    """[(name, text)]: the common conventions, the command's own, and every assumption the JSON holds.

    From the JSON: the values of any key named `assumptions` (a dict of name -> text, or a list of
    texts; nested dicts such as budget settings are shown as JSON) and of keys ending in `_rule`,
    each named by its path in the dictionary.
    """
    out = list(COMMON_ASSUMPTIONS.items()) + list(command_assumptions(command).items())

    def walk(node, path):
        if isinstance(node, dict):
            for key, value in node.items():
                where = f"{path}.{key}" if path else str(key)
                if key == "assumptions":
                    if isinstance(value, dict):
                        out.extend((f"{where}.{k}", v if isinstance(v, str) else json.dumps(v, sort_keys=True))
                                   for k, v in value.items())
                    elif isinstance(value, list):
                        out.extend((f"{where}[{k}]", str(v)) for k, v in enumerate(value))
                elif str(key).endswith("_rule") and isinstance(value, str):
                    out.append((where, value))
                else:
                    walk(value, where)
        elif isinstance(node, list):
            for k, value in enumerate(node):
                if isinstance(value, (dict, list)):
                    walk(value, f"{path}[{k}]")

    walk(data, "")
    return out


def versions() -> dict:
    """{name: version} of Python and of VERSIONED ('not installed' where a distribution is missing)."""
    from importlib import metadata
    out = {"python": platform.python_version()}
    for name in VERSIONED:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed" + (" (run from a source tree)" if name == "qhl" else "")
    return out


def png_base64(draw) -> str:
    """Base64 text of the PNG that `draw(file)` writes (a matplotlib savefig target), or of a Figure."""
    buf = io.BytesIO()
    if hasattr(draw, "savefig"):
        import matplotlib.pyplot as plt
        draw.savefig(buf, format="png", dpi=110, bbox_inches="tight")
        plt.close(draw)
    else:
        draw(buf)
    data = buf.getvalue()
    if not data.startswith(b"\x89PNG\r\n\x1a\n"):
        raise ValueError("the plot did not write a PNG")
    return base64.b64encode(data).decode("ascii")


def _nearest(grid, value):
    import numpy as np
    return int(np.argmin(abs(np.log(np.asarray(grid, float) / float(value)))))


def _plots(command, data, sweep, fit, scan_results, figures, drawings=()) -> tuple[list, list]:
    """([(caption, base64 PNG)], [notes on plots left out]) from objects the command already holds."""
    import matplotlib
    matplotlib.use("Agg")
    plots, notes = [], []
    if sweep is not None:
        from ..costing.budget_plots import plot_budget_sweep
        i, j = _nearest(sweep.times, data["time_s"]), _nearest(sweep.precisions, data["precision"])
        plots.append(("model-based budgets against evolution time and precision (log-log)",
                      png_base64(lambda f: plot_budget_sweep(sweep, f, i, j))))
    elif command == "budget":
        notes.append("no sweep was computed, so there is no plot: --sweep-time, --sweep-precision or --plot add one")
    if fit is not None:
        if fit.fit.diverged:
            notes.append("the fit diverged: no fit plot")
        else:
            from ..learning.fit_plots import plot_fit
            plots.append(("data and fit, residuals in units of sigma, convergence", png_base64(lambda f: plot_fit(fit, f))))
    if scan_results is not None:
        import tempfile
        from ..survey.scan import read_results
        from ..survey.scan_plots import plot_scan
        rows = read_results(scan_results)[1]
        if rows:
            with tempfile.TemporaryDirectory() as tmp:
                for path in plot_scan(rows, tmp):
                    plots.append((Path(path).stem.replace("_", " "),
                                  base64.b64encode(Path(path).read_bytes()).decode("ascii")))
        else:
            notes.append("the results file holds no finished task: no plot")
    for caption, make in figures:
        plots.append((caption, png_base64(make() if callable(make) and not hasattr(make, "savefig") else make)))
    for caption, draw in drawings:
        plots.append((caption, png_base64(draw)))
    return plots, notes


def _format(value):
    """A plain JSON value as short text: floats to 6 significant digits, integers with separators."""
    if isinstance(value, bool) or value is None:
        return json.dumps(value)
    if isinstance(value, int):
        return f"{value:,}" if abs(value) >= 10_000 else str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        return f"{value:.6g}"
    return str(value)


def _scalar(value):
    return not isinstance(value, (dict, list))


def _environment():
    from jinja2 import Environment, PackageLoader, select_autoescape
    env = Environment(loader=PackageLoader("qhl.report", "templates"),
                      autoescape=select_autoescape(["html", "j2"], default_for_string=True, default=True),
                      trim_blocks=True, lstrip_blocks=True)
    env.filters["plain"] = _format
    env.globals.update(max_rows=MAX_ROWS, max_cells=MAX_CELLS)
    env.tests["mapping"] = lambda v: isinstance(v, dict)
    env.tests["rowlist"] = lambda v: isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)
    env.tests["scalar"] = _scalar
    env.tests["shortlist"] = lambda v: (isinstance(v, list) and 0 < len(v) <= 12 and all(map(_scalar, v))
                                        and not any(isinstance(x, str) and len(x) > 40 for x in v))
    env.tests["matrix"] = lambda v: (isinstance(v, list) and bool(v) and all(isinstance(r, list) and r for r in v)
                                     and all(_scalar(x) for r in v for x in r))
    return env


def _columns(rows):
    cols = []
    for row in rows:
        cols.extend(k for k in row if k not in cols)
    return cols


def render_report(command: str, data: dict, *, argv=None, subject: str | None = None, sweep=None, fit=None,
                  scan_results=None, figures=(), drawings=(), created=None) -> str:
    """The HTML text of the report of one `command` run.

    Args:
        command: one of REPORT_COMMANDS.
        data: the dictionary the command prints with --json, as plain JSON types (lists, dicts,
            str, int, float, bool, None); it is embedded verbatim and drawn as tables.
        argv: the command-line arguments after `qhl` (shown quoted as a shell line).
        subject: what the run was about (a cluster name, the scanned files), shown in the title.
        sweep: a qhl.costing.BudgetSweep the command computed (budget plots).
        fit: a qhl.learning.fitting.LearnReport (data vs fit plot).
        scan_results: a scan's results CSV (learnability and ergodicity plots).
        figures: [(caption, Figure or callable returning a Figure)] drawn by the command's own code.
        drawings: [(caption, callable(file))]: the command's own plot functions that write a PNG to a
            file (a path or a binary buffer).
        created: a datetime for the report's date (default now, UTC).
    """
    if command not in REPORT_COMMANDS:
        raise ValueError(f"unknown command {command!r}; expected one of {', '.join(REPORT_COMMANDS)}")
    json_text = json.dumps(data, indent=1, allow_nan=False)
    plots, plot_notes = _plots(command, data, sweep, fit, scan_results, list(figures), list(drawings))
    assumptions = collect_assumptions(command, data)
    in_assumptions = {k for k in data if k == "assumptions" or str(k).endswith("_rule")}
    scalars = [(k, v) for k, v in data.items() if not isinstance(v, (dict, list)) and k not in in_assumptions]
    sections = [(k, v) for k, v in data.items() if isinstance(v, (dict, list)) and k not in in_assumptions]
    created = created or datetime.datetime.now(datetime.timezone.utc)
    context = {
        "command": command,
        "subject": subject,
        "command_line": "qhl " + shlex.join([str(a) for a in argv]) if argv is not None else f"qhl {command}",
        "created": created.strftime("%Y-%m-%d %H:%M:%S UTC"),
        "versions": versions(),
        "scalars": scalars,
        "sections": sections,
        "assumption_keys": sorted(in_assumptions),
        "assumptions": assumptions,
        "plots": plots,
        "plot_notes": plot_notes,
        "json_text": json_text,
        "json_b64": base64.b64encode(json_text.encode("utf-8")).decode("ascii"),
        "json_name": f"qhl-{command}.json",
        "columns": _columns,
    }
    return _environment().get_template("report.html.j2").render(**context)


def write_report(path, command: str, data: dict, **kwargs) -> Path:
    """Render the report (render_report's arguments) and write it to `path` as UTF-8; returns the path."""
    html = render_report(command, data, **kwargs)
    p = Path(path)
    p.write_text(html, encoding="utf-8")
    return p
