"""Figures: public functions that draw into a given matplotlib Axes (no backend switching)."""
