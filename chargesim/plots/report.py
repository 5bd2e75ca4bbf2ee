"""The report of a results file: PNG figures and a text summary."""
import os

import numpy as np

from ..analysis import efficiency
from ..io import open_results
from . import figures

_FIGURES = (
    ("field_map.png", figures.field_map),
    ("particle_paths.png", figures.particle_paths),
    ("deposition.png", figures.deposition),
    ("grade_efficiency.png", figures.grade_efficiency),
    ("diagnostics.png", figures.diagnostics),
)


def _fmt(v, unit=""):
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.6g}{(' ' + unit) if unit else ''}"
    return f"{v}{(' ' + unit) if unit else ''}"


def _hazards(res):
    h = res.summary.get("hazards")
    if h is None:
        h = res.info.get("hazards")
    return h or []


def _cautions():
    try:
        from ..physics import hazards

        return hazards.CAUTIONS.strip()
    except (ImportError, AttributeError):
        return ("These checks are simplified estimates. They do not replace a hazard assessment under local "
                "codes and standards by qualified people.")


def summary_text(res, notes, grade=None):
    """The text summary of a results file (str)."""
    s = res.summary
    lines = [f"chargesim results report: {res.path}", ""]
    name = res.info.get("scenario_name")
    if name:
        lines.append(f"scenario: {name}")
    lines += [f"program version: {res.attrs.get('program_version')}, format {res.attrs.get('format')} "
              f"{res.attrs.get('format_version')}",
              f"created (UTC): {res.attrs.get('created')}; seed: {res.seed}",
              f"run finished: {'yes' if res.finished else 'NO (unfinished or killed run; totals are partial)'}",
              ""]
    lines.append("Masses (real particles, kg)")
    for k in ("emitted_mass", "deposited_mass", "escaped_mass", "airborne_mass"):
        if k in s:
            lines.append(f"  {k.replace('_', ' '):<22}{_fmt(float(s[k]), 'kg')}")
    lines.append("")
    lines.append("Efficiencies")
    ce = res.collection_efficiency()
    lines.append(f"  collection efficiency (deposited / emitted mass): {_fmt(ce)}")
    em = res.emitted_mass()
    dep = res.deposits
    if dep and np.isfinite(em) and em > 0:
        for surf in dict.fromkeys(dep["surface"].tolist()):
            te = efficiency.transfer_efficiency(dep, em, surf)
            lines.append(f"  share of emitted mass on '{surf}' (transfer efficiency): {_fmt(te)}")
    if grade is not None:
        g, note = grade
        lines.append("  grade efficiency (by real number), per diameter bin:")
        lines.append(f"    {'bin (um)':<22}{'efficiency':>12}{'std err':>10}{'simulated':>11}")
        for lo, hi, e, se, n in zip(g["edges"][:-1], g["edges"][1:], g["efficiency"], g["stderr"],
                                    g["n_simulated"]):
            lines.append(f"    {lo * 1e6:8.3g} - {hi * 1e6:<9.3g}{e:>12.4f}{se:>10.4f}{int(n):>11d}")
        if note:
            lines.append(f"  note: {note}")
    lines.append("")
    lines.append("Counts (simulated particles; real = sum of weights)")
    for label, rec in (("deposited", res.deposits), ("escaped", res.escapes)):
        c = efficiency.counts(rec) if rec else {}
        if not c:
            lines.append(f"  {label}: none")
        for surf, v in c.items():
            lines.append(f"  {label} on '{surf}': {v['simulated']} simulated, {v['real']:.6g} real, "
                         f"{v['mass']:.6g} kg")
    if res.final:
        lines.append(f"  still in flight at the end: {len(res.final.get('id', ()))} simulated")
    lines.append(f"  frames: {len(res.frames)}; diagnostics rows: {len(res.diagnostics.get('time', ()))}; "
                 f"field grids: {', '.join(res.field_names) or 'none'}")
    lines.append("")
    hz = _hazards(res)
    info = [h for h in hz if isinstance(h, dict) and h.get("severity") == "info"]
    hz = [h for h in hz if h not in info]

    def finding(h):
        if not isinstance(h, dict):
            return f"  - {h}"
        msg = h.get("message") or h.get("kind")
        extra = ""
        if "value" in h and "threshold" in h:
            extra = f" ({_fmt(h['value'], h.get('units', ''))} vs {_fmt(h['threshold'], h.get('units', ''))})"
        return f"  - [{h.get('kind', 'finding')}] {h.get('name', '')}: {msg}{extra}"

    if info:
        # corona onset of discharge electrodes: information for the design, not a hazard
        lines.append("Corona electrodes")
        lines.extend(finding(h) for h in info)
        lines.append("")
    lines.append("Safety findings")
    if not hz:
        lines.append("  none stored in this file")
    lines.extend(finding(h) for h in hz)
    lines.append("")
    lines.append("Cautions")
    caut = _cautions().splitlines()
    if caut and caut[0].strip().lower().rstrip(":") == "cautions":
        caut = caut[1:]
    lines += ["  " + ln for ln in caut]
    lines.append("")
    lines.append("Figures")
    for n in notes:
        lines.append(f"  {n}")
    return "\n".join(lines) + "\n"


def make_report(results_path, out_dir):
    """Write the figures and the text summary of a results file.

    Parameters
    ----------
    results_path : str or os.PathLike
        A results file (finished or not).
    out_dir : str or os.PathLike
        Directory for the report (created if missing).

    Returns
    -------
    list of str
        Paths written: the PNG figures that have data, then ``summary.txt``
        (which notes each figure skipped and why).

    Raises
    ------
    ValueError
        If the file is not a readable chargesim results file.
    """
    res = open_results(results_path)
    out_dir = os.fspath(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    written, notes, grade = [], [], None
    for fname, fn in _FIGURES:
        path = os.path.join(out_dir, fname)
        got = fn(res, path)
        if fn is figures.grade_efficiency:
            got, grade = got
        if isinstance(got, str) and got.startswith("skipped"):
            notes.append(f"{fname}: {got}")
        else:
            written.append(got)
            notes.append(f"{fname}: written")
    text = os.path.join(out_dir, "summary.txt")
    with open(text, "w", encoding="utf-8") as fh:
        fh.write(summary_text(res, notes, grade))
    written.append(text)
    return written
