"""Synthetic sites and rover runs (``tinyloc sim``; docs/sim.md).

- :mod:`.site`: procedural site generator (the map as GeoJSON, with map errors, and the hidden world)
- :mod:`.world`: the hidden 3D world, its file format, ground-material and shadow rasters
- :mod:`.render` (+ ``_render_kernels``): the camera renderer (frames and class labels)
- :mod:`.rover`: route, speed profile and attitude of the simulated rover
- :mod:`.sensors`: accelerometer, wheel odometry and GNSS models
- :mod:`.runs`: a whole simulated run written as a run folder
- :mod:`.demo`: the bundled demo data
"""
