"""Engine: model grid and back, inference, post-processing, QC image and result folders."""
