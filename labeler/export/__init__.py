"""GeoJSON, PNG masks, manifest and reports out; import of masks back in."""
