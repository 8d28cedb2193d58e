"""The physics of the material: BHZ parameter presets, the BHZ lattice model, and the disorder
kinds with their counter-based random numbers (one registry, :data:`DISORDER_KINDS`)."""
