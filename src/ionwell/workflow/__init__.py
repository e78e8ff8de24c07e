"""The Python body of each Snakemake rule (one function per rule) and the parse-time plan."""
