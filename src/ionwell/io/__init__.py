"""File formats, one module per format; reading and writing only (decisions live in science/).

- :mod:`ionwell.io.structures`: structure files (any ASE format) and a campaign's host.
- :mod:`ionwell.io.cube`: Gaussian cube files.
- :mod:`ionwell.io.npz`: ionwell's grid store, a step's ``potential.npz``.
- :mod:`ionwell.io.maps`: engine potential maps (cube via :mod:`ionwell.io.cube`, NumPy array
  with a JSON sidecar, XSF), in the configured unit and sign.
"""
