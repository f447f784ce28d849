"""Load: spectra of every supported layout, observation metadata, air/vacuum, line lists, table writers.

May import only ``lineshift.model``, ``lineshift.errors``, ``lineshift.linefit`` and ``lineshift._version``."""
