"""Support modules of ``make bench`` (scripts/bench.py): rides, floors, child runs, the table.

Nothing here prints; the script passes a ``say`` callback for progress lines. Every figure is
a :class:`bench.table.Row`; a part of crankbeat that has not landed yet gives a row whose
status is ``NOT MEASURED`` with the reason, never a made-up number.
"""
