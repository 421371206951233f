"""Road-network sources (OpenStreetMap, GeoJSON) and the compiled network file.

* :mod:`livematch.mapdata.osm`: OpenStreetMap PBF/XML through osmium, with the class,
  access and one-way rules.
* :mod:`livematch.mapdata.geojson`: GeoJSON FeatureCollections of LineStrings.
* :mod:`livematch.mapdata.netfile`: the compiled ``.lmnet`` file and
  :func:`~livematch.mapdata.netfile.open_network`, which opens any of them.
* :mod:`livematch.mapdata.options`: :class:`ImportOptions` and :class:`ImportStats`.
* :mod:`livematch.mapdata.summary`: the facts ``livematch network info`` prints.
"""
