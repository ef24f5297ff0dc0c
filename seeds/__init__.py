"""Generator of the invented demo scenario (shipped in the package as ``archive.seeds``)."""
