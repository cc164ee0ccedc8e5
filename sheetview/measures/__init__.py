"""Measures: plain functions of a Structure or a PhaseGrid returning small result objects."""
