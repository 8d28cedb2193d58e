"""What a paper needs from a run: figures (PDF, PNG and CSV), the supplementary-data package
with its methods text, the device preview and the report that ties them together."""
