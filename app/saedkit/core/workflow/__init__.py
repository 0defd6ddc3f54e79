"""Whole analyses: the analysis record, the pipeline steps and the session of an open pattern."""
