"""Sweeps to module text: layout, naming, printing, formatting, templates, target
interpreters.
"""
