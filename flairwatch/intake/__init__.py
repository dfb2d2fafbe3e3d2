"""Intake: find files, group them into series, pick the FLAIR series, load each onto its own grid."""
