"""File formats, one module per format: potential maps, structures. Reading and writing only."""
