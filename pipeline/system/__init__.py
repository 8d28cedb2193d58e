"""From a device outline to a finalized Kwant system with a lead at every contact, and the
preflight checks of a device and material (bulk gap, edge states, discretisation, memory)."""
