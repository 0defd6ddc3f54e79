"""The camera constant: fits on ring and spot standards, the calibration library."""
