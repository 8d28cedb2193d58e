"""The long-edge stage: edges beyond direct reach, composed from disordered segments.

Modules, one job each:

* :mod:`~pipeline.longedges.smatrix` -- scattering and probability matrices, the star product;
* :mod:`~pipeline.longedges.modes` -- the canonical mode basis of a clean strip, the strip
  scatterer, evanescent length and guard rails;
* :mod:`~pipeline.longedges.pools` -- pools of disordered segments (solving, merging);
* :mod:`~pipeline.longedges.compose` -- random sequences of segments composed into edges;
* :mod:`~pipeline.longedges.direct` -- direct solves of long strips for validation;
* :mod:`~pipeline.longedges.storage` -- saving and loading pools in Zarr;
* :mod:`~pipeline.longedges.run` -- the stage for a config's ``[concatenation]`` table.
"""
