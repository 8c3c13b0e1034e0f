"""The screen's plots (one per metric) and a self-contained HTML report.

`metric_plot` draws a point per stack for each group (seeded horizontal
jitter) and each group's median as a bar; `write_screen_report` writes
plots/<metric>.png and report.html (inline CSS, plots embedded as base64
PNG): counts, failures with their messages, the statistics table of each
metric with units, per-stack warnings, provenance and the disclaimer.
"""

from __future__ import annotations

import base64
import html
import io as _bytesio
import math
import pathlib

import numpy as np

from waves import io

__all__ = ["metric_plot", "write_screen_report", "DISCLAIMER", "P_VALUE_NOTE"]

DISCLAIMER = "research measurements; not a clinical, diagnostic or safety judgement"
P_VALUE_NOTE = (
    "p-values and intervals are descriptive numbers for a research screen, not a clinical, "
    "diagnostic or regulatory judgement; they assume stacks (or replicates) are independent."
)

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:2em auto;
max-width:1100px;color:#222;line-height:1.4;padding:0 1em}
h1{font-size:1.5em;margin-bottom:.2em}h2{font-size:1.2em;margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}
th,td{border:1px solid #ccc;padding:.25em .5em;text-align:right}th{background:#f2f2f2}
td.t,th.t{text-align:left}.warn{color:#8a4b00}.bad{color:#a00}.small{font-size:.85em;color:#555}
.disclaimer{background:#fff6e0;border:1px solid #e6c36a;padding:.5em .8em;margin:1em 0}
img{max-width:100%;height:auto}
"""


def metric_plot(values, groups, *, metric: str, unit: str, order=None, seed: int = 0):
    """A matplotlib Figure: a point per stack for each group and each
    group's median as a horizontal bar.  values: one number per stack (NaN
    = not measured, not drawn); order: group order (default: first
    appearance)."""
    from matplotlib.figure import Figure

    v = np.asarray(values, dtype=np.float64)
    g = np.asarray([str(x) for x in groups], dtype=object)
    names = list(order) if order is not None else list(dict.fromkeys(g.tolist()))
    fig = Figure(figsize=(max(4.0, 0.9 * len(names) + 2.0), 3.6), dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    rng = np.random.default_rng(seed)
    for i, name in enumerate(names):
        y = v[(g == name) & np.isfinite(v)]
        x = i + rng.uniform(-0.18, 0.18, size=y.size)
        ax.plot(x, y, "o", ms=4, alpha=0.7, color="C0" if i == 0 else "C1", mec="none")
        if y.size:
            ax.hlines(np.median(y), i - 0.3, i + 0.3, color="k", lw=2)
    ax.set_xticks(range(len(names)))
    ax.set_xticklabels(names, rotation=30 if len(names) > 4 else 0, ha="right" if len(names) > 4 else "center")
    ax.set_xlim(-0.6, len(names) - 0.4)
    ax.set_ylabel(f"{metric} ({unit})" if unit else metric)
    ax.set_title("a point per stack; bar: group median", fontsize=9)
    fig.tight_layout()
    return fig


def _png(fig) -> bytes:
    buf = _bytesio.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _fmt(v, digits: int = 4) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return "" if not math.isfinite(v) else f"{v:.{digits}g}"
    return html.escape(str(v))


def write_screen_report(result, out_dir, *, provenance: dict) -> list[str]:
    """Write plots/<metric>.png and report.html for a `waves.screen.ScreenResult`
    into `out_dir`.  Returns the file names written (relative to out_dir)."""
    from waves.screen import metric_unit

    out = pathlib.Path(out_dir)
    (out / "plots").mkdir(parents=True, exist_ok=True)
    t = result.table
    ok = [i for i, s in enumerate(t["status"]) if s == "ok"]
    groups_all = list(dict.fromkeys(t["group"]))
    order = ([result.reference] if result.reference in groups_all else []) + [
        g for g in groups_all if g != result.reference
    ]
    files: list[str] = []
    plots_html = []
    for k, metric in enumerate(result.metrics):
        vals = [math.nan if t[metric][i] is None else float(t[metric][i]) for i in ok]
        fig = metric_plot(vals, [t["group"][i] for i in ok], metric=metric, unit=metric_unit(metric),
                          order=order, seed=k)
        data = _png(fig)
        name = f"plots/{metric}.png"
        with io.atomic_output(out / name, "wb") as fh:
            fh.write(data)
        files.append(name)
        rows = [c for c in result.comparisons if c.metric == metric]
        unit = metric_unit(metric)
        table_rows = "".join(
            "<tr>"
            f"<td class=t>{html.escape(c.group)}</td><td>{c.n}</td><td>{_fmt(c.median)}</td>"
            f"<td>{c.n_reference}</td><td>{_fmt(c.median_reference)}</td><td>{_fmt(c.difference)}</td>"
            f"<td>{_fmt(c.ci_low)} to {_fmt(c.ci_high)}</td><td>{_fmt(c.p_value, 3)}</td>"
            f"<td>{_fmt(c.p_holm, 3)}</td><td>{_fmt(c.cliffs_delta, 3)}</td>"
            f"<td class=t>{html.escape(c.test_method)}, per {html.escape(c.level)}</td></tr>"
            for c in rows
        )
        stats_html = (
            "<table><tr><th class=t>group</th><th>n</th><th>median</th><th>n ref</th>"
            f"<th>median ref</th><th>difference ({html.escape(unit)})</th><th>95 % interval</th>"
            "<th>p (Mann-Whitney)</th><th>p Holm</th><th>Cliff's delta</th><th class=t>test</th></tr>"
            f"{table_rows}</table>" if rows else "<p class=small>no comparison</p>"
        )
        plots_html.append(
            f"<h2>{html.escape(metric)} ({html.escape(unit)})</h2>{stats_html}"
            f"<img alt='{html.escape(metric)} per stack' src='data:image/png;base64,"
            f"{base64.b64encode(data).decode('ascii')}'>"
        )
    counts = provenance["counts"]
    fail_rows = "".join(
        f"<tr><td>{line}</td><td class=t>{html.escape(path)}</td><td class='t bad'>{html.escape(msg)}</td></tr>"
        for line, path, msg in result.failures
    )
    failures = (
        "<table><tr><th>line</th><th class=t>path</th><th class=t>message</th></tr>" + fail_rows + "</table>"
        if fail_rows else "<p>every stack was analysed.</p>"
    )
    warn_rows = "".join(
        f"<tr><td>{t['line'][i]}</td><td class=t>{html.escape(t['path'][i])}</td>"
        f"<td class='t warn'>{html.escape(t['warnings'][i])}</td></tr>"
        for i in ok if t["warnings"][i]
    )
    warnings = (
        "<table><tr><th>line</th><th class=t>path</th><th class=t>warnings</th></tr>" + warn_rows + "</table>"
        if warn_rows else "<p>no stack carries a warning.</p>"
    )
    group_rows = "".join(
        f"<tr><td class=t>{html.escape(g)}</td><td>{sum(1 for x in t['group'] if x == g)}</td>"
        f"<td>{sum(1 for i in ok if t['group'][i] == g)}</td></tr>"
        for g in order
    )
    level = "replicate medians (the median of each replicate first)" if provenance["statistics"][
        "replicate_level"] else "stacks"
    notes = "".join(f"<p class=warn>{html.escape(n)}</p>" for n in provenance.get("notes", []))
    prov = html.escape(__import__("json").dumps(provenance, indent=2))
    doc = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>waves screen report</title>
<style>{_CSS}</style></head><body>
<h1>Screen report</h1>
<p class=small>waves {html.escape(provenance['waves_version'])}; sheet {html.escape(provenance['sheet']['path'])}
(sha256 {html.escape(provenance['sheet']['sha256'][:16])}...); started {html.escape(provenance['started_utc'])}</p>
<div class=disclaimer>{DISCLAIMER.capitalize()}. {html.escape(P_VALUE_NOTE)}</div>
<h2>Stacks</h2>
<p>{counts['rows']} rows: {counts['analysed']} analysed in this run, {counts['reused']} reused from
earlier runs, {counts['failed']} failed.</p>
<table><tr><th class=t>group</th><th>rows</th><th>analysed</th></tr>{group_rows}</table>
<h3>Failures</h3>{failures}
<h3>Warnings</h3>{warnings}
<h2>Statistics</h2>
<p>Each group against the reference <b>{html.escape(str(result.reference))}</b>, on {level}:
difference of medians with a percentile bootstrap 95 % interval
({provenance['statistics']['n_boot']} resamples, seed {provenance['statistics']['seed']}),
two-sided Mann-Whitney U p-value with Holm's correction (family: {html.escape(provenance['statistics']['holm_family'])}),
and Cliff's delta (+1: every value of the group above every value of the reference).</p>
{notes}
{''.join(plots_html)}
<h2>Provenance</h2><pre class=small>{prov}</pre>
<p class=small>{DISCLAIMER}</p>
</body></html>
"""
    with io.atomic_output(out / "report.html", "w") as fh:
        fh.write(doc)
    files.append("report.html")
    return files
