"""Transport from a finalized system: the solver settings, the transmission matrix between
contacts, the multi-terminal Landauer-Buttiker resistances, and the environment report."""
