"""Per-model reports: one self-contained folder (``index.html`` + PNGs) per model.

    write_report(model, out_dir, coarse_test_snapshots=None, les_result=None, sweep=None)
    build_report(model_or_path, out_dir, input_path=None, les=None, sweep=None, snapshots=None)

Figures are in :mod:`closure.report.plots`, transfer spectra in :mod:`closure.report.spectra`.
"""

from closure.report.gather import build_report, load_model
from closure.report.page import CAUTION, write_report

__all__ = ["CAUTION", "build_report", "load_model", "write_report"]
