"""The sketchmerge benchmark suite; ``benchmarks/run.py`` is its one entry point.

Modules: :mod:`.data` generates the datasets, :mod:`.proc` runs whole processes and
measures their wall time and peak memory, :mod:`.cases` holds the measurements,
:mod:`.model` the cost model, and :mod:`.report` writes the Markdown table and chart.
"""
