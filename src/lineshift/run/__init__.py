"""Run: the batch pipeline, executors, results store, TOML config and mask building over a batch.

May import every floor below (``calib``, ``sim``, ``plots``, ``io``, ``measure``, ``series``, the base
modules), never ``api`` or ``cli``."""
