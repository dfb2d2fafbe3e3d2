"""Ledger: the SQLite record of files, jobs, results and QC decisions."""
