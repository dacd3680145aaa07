"""The pipeline file: loading, the declared schema, typed options, the starter file."""
