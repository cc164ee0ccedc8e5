"""Measures: plain functions of a Structure or a PhaseGrid (plus explicit parameters) that
return typed result objects. A measure never reads files, prints or plots. The named
measures of ``sheetview measure`` are listed in :mod:`sheetview.app.registry`."""
