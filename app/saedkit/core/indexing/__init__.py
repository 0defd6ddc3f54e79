"""Indexing: the 2-D lattice of a spot pattern, zone-axis matching, phase identification from rings."""
