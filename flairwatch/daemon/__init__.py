"""Daemon: watch the inbox, settle series, run workers, report status."""
