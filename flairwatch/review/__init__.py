"""QC review in the browser: the optional ``review`` web application (the ``review`` extra)."""
