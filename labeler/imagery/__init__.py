"""Reading images and GeoTIFFs, georeferencing, tiling and stitching."""
