"""Figures and the report of a results file.

``make_report(results_path, out_dir) -> list of paths``: PNG figures (field
magnitude map with field lines and electrodes, particle paths coloured by
diameter, deposition density per surface, grade efficiency with the
Deutsch-Anderson curve, diagnostics over time) and ``summary.txt``
(efficiencies, counts, masses, safety findings with the usual cautions).
Figures without data in the file are skipped, with a note in the summary.
"""
from .report import make_report, summary_text

__all__ = ["make_report", "summary_text"]
