"""The sensitivity appendix: HTML page, Markdown, LaTeX tables, figures, results and provenance.

``write_appendix(comparison, out_dir)`` writes the folder; the figure functions in
:mod:`robustmod.report.figures` return matplotlib Figures for notebook use.
"""
from __future__ import annotations

from .writers import APPENDIX_FILES, CAUTIONS, write_appendix

__all__ = ["APPENDIX_FILES", "CAUTIONS", "write_appendix"]
