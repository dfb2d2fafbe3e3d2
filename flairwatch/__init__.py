"""flairwatch: white-matter hyperintensity masks and volumes from FLAIR MRI, for research use only."""

__version__ = "0.1.0"
