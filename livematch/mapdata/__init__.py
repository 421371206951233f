"""Road-network sources (OpenStreetMap, GeoJSON) and the compiled network file."""
