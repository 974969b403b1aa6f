"""Site maps: GeoJSON + class rules -> packed map file (``.tlm``) -> windows of class coverage.

- :mod:`.geojson`  reading and validating RFC 7946 FeatureCollections
- :mod:`.rules`    property rules -> classes (``default_rules.toml`` for common open-map tagging)
- :mod:`.raster`   anti-aliased coverage rasterization (numba kernels in ``_kernels.py``)
- :mod:`.packfile` the packed file format: :class:`PackWriter`, :class:`PackedMap`
- :mod:`.compile`  :func:`pack_geojson`, the compiler
- :mod:`.render`   colour previews with a legend
"""

from .packfile import MapMeta, PackedMap  # noqa: F401
