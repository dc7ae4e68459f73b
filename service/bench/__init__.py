"""The benchmark behind ``excerpta bench``: synthetic collections, stage timings, references.

Every figure the command prints is also returned as plain data (and written by ``--json``), and
every ratio and target verdict is computed from those figures, so a reader can recompute them.
"""
