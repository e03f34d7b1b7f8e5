"""The study and its files: the study file (spec), the run table (runs), the study lock, initial designs.

Nothing here fits a model; everything above reads from here.
"""
