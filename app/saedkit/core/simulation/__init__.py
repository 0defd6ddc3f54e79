"""The pattern simulator (kinematic spots and rings, detector effects) used by the demo and the tests."""
