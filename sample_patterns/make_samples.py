"""Rebuild the demo patterns in this folder with saedkit's simulator (see README.md)."""

from pathlib import Path

from saedkit.demo import write_demo_patterns

if __name__ == "__main__":
    files = write_demo_patterns(Path(__file__).resolve().parent)
    print("wrote", files.film.name, files.grain_a.name, files.grain_b.name, "in", files.folder)
