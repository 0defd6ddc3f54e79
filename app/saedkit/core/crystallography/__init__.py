"""Crystallography: unit cells, phases, structure factors, zone-axis geometry, the phase library."""
