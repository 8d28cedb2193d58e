"""The ``helisweep`` command: parsing, the commands and the demonstration scenario."""
