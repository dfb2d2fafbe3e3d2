"""DICOM network transfer: results sent from the ledger's outbox, scans received into the inbox."""
