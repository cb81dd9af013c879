"""Per-model reports: figures (:mod:`closure.report.plots`), transfer spectra
(:mod:`closure.report.spectra`) and the self-contained HTML folder."""
