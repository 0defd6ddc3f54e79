"""How results are shown: the display mapping, marker styles and label placement shared by the screen and the reports."""
