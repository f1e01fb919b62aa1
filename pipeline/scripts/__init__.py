"""Rule scripts: thin shells that hand the `snakemake` object's fields to package functions."""
