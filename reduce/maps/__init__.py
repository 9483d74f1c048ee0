"""Maps: what reduce knows about geometry beyond hex cells' indexes.

- :mod:`reduce.maps.boundaries`: boundaries (GeoJSON polygons) and point-in-polygon region
  assignment, grid-indexed.
- :mod:`reduce.maps.geojson`: RFC 7946 geometry: hex cells and polygons as GeoJSON, winding,
  antimeridian split, feature collections.
- :mod:`reduce.maps.topology`: shared-border simplification and quantization of a tiling.
"""
