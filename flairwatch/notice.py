"""The research-only cautions shown with every result."""

from __future__ import annotations

BANNER = "RESEARCH USE ONLY - NOT FOR DIAGNOSIS OR TREATMENT"

NOTICE_FILE = "RESEARCH_ONLY.txt"

NOTICE_TEXT = """\
RESEARCH USE ONLY - NOT FOR DIAGNOSIS OR TREATMENT

The files in this folder were made automatically by flairwatch, open-source research software.
They are not a medical device and have not been cleared or approved for clinical use.

- Do not use these masks, volumes or pictures to diagnose, treat or make decisions about anyone's
  health. A qualified reader must review any image for clinical purposes.
- The shipped model was trained on synthetic (computer-generated) images only. Automatic WMH
  segmentations can miss lesions and mark normal tissue, especially on scanners, protocols and
  populations the model has not seen.
- Validate any model on your own labelled scans (`flairwatch validate`) before relying on it, and
  review every QC image.
- Handle these files under your local rules for identifiable health data and research ethics,
  and within your licensed practice.
"""

CAUTION = (
    "flairwatch: research use only, not for diagnosis or treatment; validate any model on your own "
    "scans and follow local rules for identifiable data."
)
"""The one-line caution every command that makes or ships results prints to stderr at start."""
