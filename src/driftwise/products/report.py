"""One self-contained HTML report of a driftwise job, built from a summary dict (and its plain-text digest).

The file carries everything inside it: figures as base64 PNG ``data:`` URIs,
the style sheet inline, no script and no external reference.  A
Content-Security-Policy meta tag (``default-src 'none'``) makes a browser
refuse any fetch the page might still attempt, so opening the report never
touches the network.

The summary is a plain JSON-like dict (the demo writes the same dict as
``summary.json``).  Every section is optional; a section named in
``summary["missing"]`` is reported as not produced, with the reason.

Keys read (all optional unless stated)::

    title, created_utc, driftwise_version (str), command (str: the exact command line)
    job:      {"description": str, "wall_time_s": float,
               "steps": [{"name", "status" ("done"|"failed"|"not available"), "seconds", "detail"}]}
    data:     {"fit": {key: value}, "heldout": {key: value}, "qc": [{"action", "count", "detail"}]}
    fit:      {"kernel", "n_tracks", "n_observations", "elbo", "hyperparameters": {name_unit: value},
               "diffusivity_m2_s", "decorrelation_time_s", "calibration_check": {"diffusivity_m2_s",
               "decorrelation_time_s"} (after a transition fit), ...}
    check:    {"families": {family: {"elbo", "heldout_log_likelihood"}}, "divergent_variance_fraction",
               "divergence": {...}, "vorticity": {...},
               "verdict": {"divergence_free": bool, "curl_free": bool, "reasons": [str]}, "reading": str}
    spread:   [{"name", "description", "method", "columns": [str], "rows": [[value]], "notes": [str],
               "formats": [None | "probability" | "degrees" | "metres" | "hours"] (per column)}]
    tide, connect, backtrack:  tables as for spread
    skill:    {"horizons_s", "n_pairs", "separation_m", "skill", "coverage_50", "coverage_95", "log_score",
               "baselines": {name: {same keys}}}
    figures:  [{"path", "caption", "section" (data|fit|tide|check|spread|connect|backtrack|skill)}]
    files:    [{"path", "description"}]
    warnings: [str];  missing: [{"section", "reason"}];  caution: str (default cli.CAUTION)

Units come from the key names (``_m``, ``_s``, ``_m_s``, ``_m2_s``), the
project's naming rule, so a value is never shown without its unit.
"""

from __future__ import annotations

import base64
import html
import math
import os
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from ..errors import InputError
from ..files import CAUTION, atomic_write_text
from ..units import FORMAT_BY_UNIT
from ..version import __version__

SECTIONS = ("data", "fit", "tide", "check", "spread", "connect", "backtrack", "skill")
_TITLES = {"data": "Data and quality control", "fit": "Fitted flow field", "tide": "Tide",
           "check": "Physical constraints",
           "spread": "Release forecasts", "connect": "Connectivity between sites",
           "backtrack": "Back-tracking a find", "skill": "Forecast skill on held-out tracks"}
_SUFFIX_UNITS = (("_m2_s", "m²/s"), ("_m_s", "m/s"), ("_m2", "m²"), ("_per_s", "s⁻¹"), ("_s", "s"), ("_m", "m"),
                 ("_deg", "°"), ("_nats", "nats"))
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_CSS = """
body{font-family:Georgia,'DejaVu Serif',serif;max-width:980px;margin:2em auto;padding:0 1em;color:#111;
line-height:1.45;background:#fff}
h1{font-size:1.7em;margin-bottom:.2em}h2{border-bottom:2px solid #333;padding-bottom:.15em;margin-top:1.8em}
h3{margin-bottom:.3em}
table{border-collapse:collapse;margin:.6em 0 1em;font-size:.92em}
th,td{border:1px solid #999;padding:.25em .6em;text-align:left;vertical-align:top}
th{background:#e8e8e8}td.num{text-align:right;font-variant-numeric:tabular-nums;font-family:'DejaVu Sans Mono',monospace}
.caution{border:2px solid #000;background:#f3f3f3;padding:.7em 1em;margin:1em 0;font-weight:bold}
.missing{border-left:6px solid #555;background:#f6f6f6;padding:.4em .8em}
.meta{color:#333;font-size:.92em}code,pre{font-family:'DejaVu Sans Mono',monospace;font-size:.9em}
pre{background:#f4f4f4;border:1px solid #ccc;padding:.5em;white-space:pre-wrap;word-break:break-all}
figure{margin:1em 0}figure img{max-width:100%;height:auto;border:1px solid #ccc}
figcaption{font-size:.9em;color:#222;margin-top:.3em}
.yes{font-weight:bold}.no{font-weight:bold;text-decoration:underline}
ul.warnings li{font-family:'DejaVu Sans Mono',monospace;font-size:.88em}
.alert{border:2px solid #000;border-left:8px solid #000;background:#fff;padding:.5em .8em;font-weight:bold}
.table-wrap{overflow-x:auto;max-width:100%}
@page{size:A4;margin:14mm 12mm}
@media print{body{max-width:none;margin:0;padding:0;font-size:10pt;line-height:1.3;color:#000}
h1{font-size:18pt}h2{font-size:14pt;break-after:avoid;page-break-after:avoid;margin-top:1.2em}
h3{break-after:avoid;page-break-after:avoid}
figure,.caution,.alert,.missing,pre{break-inside:avoid;page-break-inside:avoid}
figure img{max-width:100%;max-height:235mm;border:none}
table{font-size:8.5pt;width:auto;max-width:100%}thead{display:table-header-group}tr{break-inside:avoid}
.table-wrap{overflow:visible}
th,.caution{-webkit-print-color-adjust:exact;print-color-adjust:exact}
ul.warnings li,pre{font-size:8pt}}
"""


# ----------------------------------------------------------------- formatting
def unit_of(name: str) -> str:
    """Unit implied by a key name's suffix (``length_scale_m`` → ``m``), or '' when none."""
    for suffix, unit in _SUFFIX_UNITS:
        if name.endswith(suffix):
            return unit
    return ""


_SPECIAL_LABELS = {"elbo": "ELBO (nats)", "elbo_per_observation": "ELBO per observation (nats)",
                   "heldout_log_likelihood": "held-out log likelihood (nats)",
                   "heldout_log_likelihood_per_observation": "held-out log likelihood per observation (nats)",
                   "log_score": "log score (nats)", "n_tracks": "tracks (–)", "n_fixes": "fixes (–)",
                   "n_observations": "velocity observations (–)", "n_inducing": "inducing points (–)",
                   "optimiser_steps": "optimiser steps (–)", "n_cells": "grid cells tested (–)",
                   "max_abs_z": "max |z| (–)", "z_critical": "critical |z| after correction (–)",
                   "significant_area_fraction": "significant share of the hull (–)",
                   "divergent_variance_fraction": "divergent share of the velocity variance (–)"}


def label_of(name: str, *, with_unit: bool = True) -> str:
    """``velocity_scale_m_s`` → ``velocity scale (m/s)``.  ``with_unit=False`` leaves out a unit that
    :func:`fmt` prints beside the value (m, s, m/s, m²/s): ``velocity scale``."""
    if name in _SPECIAL_LABELS:
        return _SPECIAL_LABELS[name]
    unit = unit_of(name)
    base = name
    for suffix, u in _SUFFIX_UNITS:
        if u == unit and unit and name.endswith(suffix):
            base = name[: -len(suffix)]
            break
    text = base.replace("_", " ").strip()
    return f"{text} ({unit})" if unit and (with_unit or unit not in FORMAT_BY_UNIT) else text


def fmt(value: Any, unit: str = "") -> str:
    """A value as shown in a table: 4 significant digits, yes/no, '—' for missing.

    A length, duration, speed or diffusivity (``unit`` "m", "s", "m/s" or "m²/s") is printed with its unit,
    in the one that fits its size, to 3 significant figures (:data:`driftwise.units.FORMAT_BY_UNIT`:
    '12.3 km', '0.5 mm', '1.5 h').  Other large numbers are written out with thin-space groups (86 400,
    not 8.64e+04).
    """
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)) and unit in FORMAT_BY_UNIT:
        return FORMAT_BY_UNIT[unit](value) if math.isfinite(value) else "—"
    if isinstance(value, int):
        return f"{value:,}".replace(",", "\u2009")
    if isinstance(value, float):
        if not math.isfinite(value):
            return "—"
        if value == 0:
            return "0"
        if 1e4 <= abs(value) < 1e12:
            return f"{round(value):,}".replace(",", "\u2009")
        return f"{value:.4g}"
    if isinstance(value, (list, tuple)):
        if len(value) <= 6 and all(isinstance(v, (int, float, bool)) or v is None for v in value):
            return ", ".join(fmt(v) for v in value)
        return f"{len(value)} values"
    if isinstance(value, Mapping):
        return "; ".join(f"{label_of(str(k), with_unit=False)}: {fmt(v, unit_of(str(k)))}" for k, v in value.items())
    return str(value)


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _cell(value: Any, unit: str = "") -> str:
    numeric = isinstance(value, (int, float)) and not isinstance(value, bool)
    text = _e(fmt(value, unit))
    return f'<td class="num">{text}</td>' if numeric else f"<td>{text}</td>"


def _flatten(mapping: Mapping[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    rows: list[tuple[str, Any]] = []
    for key, value in mapping.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            rows += _flatten(value, prefix=f"{name} / ")
        else:
            rows.append((name, value))
    return rows


def key_value_table(mapping: Mapping[str, Any], *, header: tuple[str, str] = ("quantity", "value")) -> str:
    """A two-column table; nested dicts are flattened as ``outer / inner``; units from the key names."""
    body = "".join(f"<tr><th scope=\"row\">{_e(_label_path(k, unit_of(k)))}</th>{_cell(v, unit_of(k))}</tr>"
                   for k, v in _flatten(mapping))
    return f"<table><thead><tr><th>{_e(header[0])}</th><th>{_e(header[1])}</th></tr></thead>" \
           f"<tbody>{body}</tbody></table>"


def _label_path(name: str, unit: str = "") -> str:
    """``outer / inner`` labels; the unit is left to the value when :func:`fmt` prints it there."""
    parts = name.split(" / ")
    return " / ".join(label_of(part, with_unit=i < len(parts) - 1 or unit not in FORMAT_BY_UNIT)
                      for i, part in enumerate(parts))


def fmt_probability(p: Any) -> str:
    """A probability to 3 decimals; a small but non-zero one as '< 0.001' rather than '0.000' or '3e-11'."""
    if not isinstance(p, (int, float)) or isinstance(p, bool) or not math.isfinite(p):
        return fmt(p)
    return "< 0.001" if 0 < p < 5e-4 else f"{p:.3f}"


COLUMN_FORMATS = {"probability": fmt_probability, "degrees": lambda v: f"{v:.5f}",
                  "metres": lambda v: f"{v:,.0f}".replace(",", "\u2009"), "hours": lambda v: f"{v:g}"}


def grid_table(columns: Sequence[str], rows: Iterable[Sequence[Any]], formats: Sequence[str | None] = ()) -> str:
    """A table with a header row; column names carry their units, e.g. ``time (h)``.

    ``formats`` optionally names a :data:`COLUMN_FORMATS` entry per column (None: the general :func:`fmt`).
    """
    head = "".join(f"<th>{_e(c)}</th>" for c in columns)
    formats = list(formats) + [None] * (len(columns) - len(formats))
    body = "".join("<tr>" + "".join(_formatted_cell(v, f) for v, f in zip(row, formats)) + "</tr>" for row in rows)
    return f"<div class=\"table-wrap\"><table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>"


def _formatted_cell(value: Any, name: str | None) -> str:
    numeric = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if name is None or not numeric:
        return _cell(value)
    return f'<td class="num">{_e(COLUMN_FORMATS[name](value))}</td>'



# ----------------------------------------------------------------- figures
def embed_png(path: str | os.PathLike) -> str:
    """The PNG at ``path`` as a ``data:image/png;base64,…`` URI (checks the PNG signature)."""
    data = Path(path).read_bytes()
    if not data.startswith(_PNG_SIGNATURE):
        raise InputError(f"{path}: is not a PNG image; the report embeds PNG figures only")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _figure_html(fig: Mapping[str, Any], base_dir: Path | None) -> str:
    path = Path(fig["path"])
    if not path.is_absolute() and base_dir is not None:
        path = base_dir / path
    caption = fig.get("caption", path.stem)
    return (f'<figure><img src="{embed_png(path)}" alt="{_e(caption)}">'
            f"<figcaption>{_e(caption)} <span class=\"meta\">[{_e(path.name)}]</span></figcaption></figure>")


# ----------------------------------------------------------------- sections
def _job(summary: Mapping[str, Any]) -> str:
    job = summary.get("job", {})
    parts = ["<h2>Job</h2>"]
    if job.get("description"):
        parts.append(f"<p>{_e(job['description'])}</p>")
    steps = job.get("steps", [])
    if steps:
        rows = [(s.get("name"), s.get("status"), s.get("seconds"), s.get("cpu_seconds"), s.get("detail", ""))
                for s in steps]
        parts.append(grid_table(["step", "status", "wall time (s)", "CPU time (s)", "detail"], rows))
    if job.get("wall_time_s") is not None:
        parts.append(f"<p>Total wall time: {_e(fmt(float(job['wall_time_s']), 's'))}.</p>")
    return "".join(parts)


def _data(data: Mapping[str, Any]) -> str:
    parts = []
    for key, name in (("fit", "Fit set"), ("heldout", "Held-out set")):
        if data.get(key):
            parts.append(f"<h3>{name}</h3>" + key_value_table(data[key]))
    qc = data.get("qc")
    parts.append("<h3>Quality-control actions</h3>")
    if qc:
        parts.append(grid_table(["action", "count", "detail"],
                                [(q.get("action"), q.get("count"), q.get("detail", "")) for q in qc]))
    else:
        parts.append("<p>None were needed: every fix passed the checks.</p>")
    return "".join(parts)


def _fit(fit: Mapping[str, Any]) -> str:
    top = {k: v for k, v in fit.items() if k not in ("hyperparameters", "notes", "calibration_check")}
    parts = [key_value_table(top)]
    if fit.get("hyperparameters"):
        parts.append("<h3>Hyperparameters</h3>" + key_value_table(fit["hyperparameters"],
                                                                   header=("hyperparameter", "value")))
    check = fit.get("calibration_check")
    if isinstance(check, Mapping):     # a transition fit estimated K itself; the separate calibration is a check
        names = ("diffusivity_m2_s", "decorrelation_time_s")
        rows = {"transition fit": {n: fit.get(n) for n in names}, "calibration check": {n: check.get(n) for n in names}}
        parts.append("<h3>K and τ: transition fit and calibration check</h3>" + key_value_table(rows))
    parts += [f"<p>{_e(n)}</p>" for n in fit.get("notes", [])]
    return "".join(parts)


def _verdict_word(value: Any) -> str:
    if value is None:
        return "<span>undetermined</span>"
    return '<span class="yes">yes</span>' if value else '<span class="no">no</span>'


def _check(check: Mapping[str, Any], elbo_note: str = "") -> str:
    parts = []
    verdict = check.get("verdict", {})
    if verdict:
        parts.append("<h3>Verdict</h3><table><tbody>"
                     f"<tr><th scope=\"row\">divergence-free</th><td>{_verdict_word(verdict.get('divergence_free'))}</td></tr>"
                     f"<tr><th scope=\"row\">curl-free</th><td>{_verdict_word(verdict.get('curl_free'))}</td></tr>"
                     "</tbody></table>")
        reasons = verdict.get("reasons") or []
        if isinstance(reasons, str):
            reasons = [reasons]
        elif isinstance(reasons, Mapping):
            reasons = [f"{k.replace('_', '-')}: {r}" for k, rs in reasons.items()
                       for r in ([rs] if isinstance(rs, str) else rs)]
        if reasons:
            parts.append("<p>Reasons:</p><ul>" + "".join(f"<li>{_e(r)}</li>" for r in reasons) + "</ul>")
        if verdict.get("rule"):
            parts.append(f"<p class=\"meta\">Decision rule: {_e(verdict['rule'])}.</p>")
    families = check.get("families")
    if families:
        cols = sorted({k for v in families.values() for k, x in v.items() if not isinstance(x, Mapping)})
        parts.append("<h3>Kernel-family evidence</h3>" + grid_table(
            ["family"] + [label_of(c) for c in cols], [[f] + [v.get(c) for c in cols] for f, v in families.items()]))
        parts.append(elbo_note)
    if check.get("reading"):
        parts.append(f"<p>{_e(check['reading'])}</p>")
    rest = {k: v for k, v in check.items() if k not in ("verdict", "families", "reading", "statistics")}
    stats = {**(check.get("statistics") or {}), **rest}
    if stats:
        parts.append("<h3>Statistics</h3>" + key_value_table(stats))
    return "".join(parts)


def _spread(scenarios: Sequence[Mapping[str, Any]]) -> str:
    parts = []
    for sc in scenarios:
        parts.append(f"<h3>{_e(sc.get('name', 'release'))}</h3>")
        if sc.get("description"):
            parts.append(f"<p>{_e(sc['description'])}</p>")
        if sc.get("method"):
            parts.append(f"<p class=\"meta\">Method: {_e(sc['method'])}</p>")
        parts += [f'<p class="alert">{_e(a)}</p>' for a in sc.get("alerts", [])]
        if sc.get("columns"):
            parts.append(grid_table(sc["columns"], sc.get("rows", []), sc.get("formats", ())))
        parts += [f"<p>{_e(n)}</p>" for n in sc.get("notes", [])]
    return "".join(parts)


_SKILL_COLUMNS = (("n_pairs", "forecasts (–)"), ("separation_m", "median separation (m)"),
                  ("separation_p90_m", "90th pct separation (m)"), ("skill", "Liu–Weisberg skill (–)"),
                  ("coverage_50", "50 % coverage (–)"), ("coverage_95", "95 % coverage (–)"),
                  ("coverage_95_se", "95 % coverage, standard error by track (–)"), ("log_score", "log score (nats)"))


def _skill(skill: Mapping[str, Any]) -> str:
    horizons = list(skill.get("horizons_s", []))
    models = [("driftwise", skill)] + list((skill.get("baselines") or {}).items())
    cols = [(k, name) for k, name in _SKILL_COLUMNS if any(k in m for _, m in models)]
    rows = []
    for label, model in models:
        for i, h in enumerate(horizons):
            rows.append([label.replace("_", " "), h / 3600.0] + [_at(model.get(k), i) for k, _ in cols])
    parts = [grid_table(["forecast", "horizon (h)"] + [n for _, n in cols], rows)]
    parts.append("<p>Skill: 1 is perfect, 0 no better than the observed track length (Liu &amp; Weisberg 2011). "
                 "Coverage: the share of observed positions inside the forecast 50 % and 95 % ellipses; "
                 "a calibrated forecast is close to 0.50 and 0.95, lower means the spread is too narrow. Its "
                 "standard error counts the starts on one track as one correlated cluster.</p>")
    parts += [f"<p>{_e(n)}</p>" for n in skill.get("notes", [])]
    return "".join(parts)


def _at(values: Any, i: int) -> Any:
    if isinstance(values, (list, tuple)) and i < len(values):
        return values[i]
    return None


def _files(files: Sequence[Mapping[str, Any]]) -> str:
    return "<h2>Files produced</h2>" + grid_table(["file", "contents"],
                                                   [(f.get("path"), f.get("description", "")) for f in files])


def _warnings(warnings: Sequence[str]) -> str:
    if not warnings:
        return "<h2>Warnings</h2><p>No warnings were raised.</p>"
    return "<h2>Warnings</h2><ul class=\"warnings\">" + "".join(f"<li>{_e(w)}</li>" for w in warnings) + "</ul>"


def elbo_comparison(summary: Mapping[str, Any]) -> str:
    """Why the check's family ELBOs differ from the fit's: different data.  Both put per observation.

    An ELBO is a lower bound on the log evidence of the data it is computed on (a sum over the
    observations), so totals on different data sets do not compare; per observation they are on
    one scale, though the check's families also use their own inducing points and step budget.
    """
    fit, families = summary.get("fit") or {}, (summary.get("check") or {}).get("families") or {}
    n_fit, elbo_fit = fit.get("n_observations"), fit.get("elbo")
    if not families or not n_fit or elbo_fit is None:
        return ""
    counts = {f.get("n_observations") for f in families.values() if f.get("n_observations")}
    if len(counts) != 1:
        return ""
    n_check = counts.pop()
    per = "; ".join(f"{_e(name)} {fmt(f['elbo'] / n_check)}" for name, f in families.items()
                    if isinstance(f.get("elbo"), (int, float)))
    return ("<p><strong>Why these ELBOs differ from the fit's.</strong> The fitted model's ELBO "
            f"({_e(fmt(elbo_fit))} nats) is a sum over all {_e(fmt(n_fit))} velocity observations of the fit "
            f"tracks: {_e(fmt(elbo_fit / n_fit))} nats per observation. Each family above was fitted on the "
            f"check's own training split, {_e(fmt(n_check))} observations (the tracks left after holding some "
            "out), with the check's own inducing points and step budget, so the totals are sums over different "
            f"data and do not compare. Per observation: {per} nats. An ELBO only ranks models fitted to the same "
            "data; across data sets compare the held-out log likelihood per observation.</p>")


_RENDER = {"data": _data, "fit": _fit, "tide": _spread, "check": _check, "spread": _spread, "connect": _spread, "backtrack": _spread,
           "skill": _skill}


def _section(name: str, summary: Mapping[str, Any], base_dir: Path | None) -> str:
    missing = {m.get("section"): m.get("reason", "") for m in summary.get("missing", [])}
    parts = [f'<h2 id="{name}">{_TITLES[name]}</h2>']
    if name in missing:
        parts.append(f'<p class="missing">Not produced: {_e(missing[name])}</p>')
    if summary.get(name):
        parts.append(_check(summary[name], elbo_comparison(summary)) if name == "check"
                     else _RENDER[name](summary[name]))
    elif name not in missing:
        return ""
    parts += [_figure_html(f, base_dir) for f in summary.get("figures", []) if f.get("section") == name]
    return "".join(parts)


# ----------------------------------------------------------------- document
def render_report(summary: Mapping[str, Any], *, base_dir: str | os.PathLike | None = None) -> str:
    """The report as one HTML string.  Relative figure paths are resolved against ``base_dir``."""

    base = Path(base_dir) if base_dir is not None else None
    title = summary.get("title", "driftwise report")
    version = summary.get("driftwise_version", __version__)
    body = [f"<h1>{_e(title)}</h1>",
            f"<p class=\"meta\">driftwise {_e(version)} · {_e(summary.get('created_utc', ''))}</p>",
            f'<p class="caution">{_e(summary.get("caution", CAUTION))}</p>',
            _job(summary)]
    body += [_section(name, summary, base) for name in SECTIONS]
    if summary.get("files"):
        body.append(_files(summary["files"]))
    body.append(_warnings(summary.get("warnings", [])))
    body.append("<h2>Provenance</h2><p>Made by driftwise " + _e(version) + " with the command:</p>"
                f"<pre>{_e(summary.get('command', '(not recorded)'))}</pre>")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"
            + "\n".join(p for p in body if p) + "</body></html>\n")


def write_report(summary: Mapping[str, Any], path: str | os.PathLike) -> Path:
    """Render ``summary`` and write it atomically to ``path``; figure paths resolve against its folder."""
    target = Path(path)
    return atomic_write_text(target, render_report(summary, base_dir=target.parent))


# ----------------------------------------------------------------- plain-text digest
def complete(summary: Mapping[str, Any]) -> bool:
    """True when every step of the demo ran to the end."""
    return all(step["status"] == "done" for step in summary["job"]["steps"])


def digest(summary: Mapping[str, Any], out: str | os.PathLike) -> str:
    """A short plain-text account of the run: key numbers, then where each file is."""

    steps = {s["name"]: s for s in summary["job"]["steps"]}
    lines = [f"driftwise demo: Mirren Bay (invented data), {summary['job']['wall_time_s']:.0f} s"]
    for name in ("data", "fit", "calibrate", "map", "tide", "check", "spread", "score", "connect", "backtrack"):
        step = steps.get(name, {"status": "not run", "detail": ""})
        text = step["detail"] if step["status"] == "done" else f"{step['status'].upper()}: {step['detail']}"
        lines.append(f"  {name:<9} {text}")
    lines.append(f"  files in {out}/")
    figures = [f for f in summary["files"] if f["path"].endswith(".png")]
    for f in summary["files"]:
        if f not in figures:
            lines.append(f"    {f['path']:<22} {f['description']}")
    if figures:
        folder = Path(figures[0]["path"]).parent.as_posix() + "/"
        lines.append(f"    {folder:<22} {len(figures)} PNG figures: " + ", ".join(Path(f['path']).name for f in figures))
    warn = summary.get("warnings", [])
    lines.append(f"  warnings: {len(warn)}" + ("" if not warn else " (also in the report)"))
    lines += [f"    {w}" for w in warn]
    if not complete(summary):
        lines.append("  The demo is INCOMPLETE: the steps marked above did not run; the report says why.")
    lines.append(CAUTION)
    return "\n".join(lines)
