"""Physics relations: constants, materials, aerosol mechanics, charging, hazards.

Pure functions on floats and numpy arrays, SI units. This is the lowest layer:
nothing here imports any other part of chargesim.
"""
