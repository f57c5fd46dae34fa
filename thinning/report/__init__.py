"""HTML reports: one page per recording (:mod:`thinning.report.recording`) and per lot.

Import the submodule you need; this package imports nothing heavy itself.
"""
