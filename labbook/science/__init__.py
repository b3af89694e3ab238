"""Pure computation for labbook: units, vacuum, ion beams, surfaces, deposition, thermometry,
images (levelling, roughness, periodicity), spectra (Savitzky-Golay dI/dV), thumbnails and
time series.

Nothing in this package imports Django. Functions take and return plain floats (or numpy
arrays where stated) in the unit their argument names carry (``pressure_mbar``,
``duration_s``, ``current_a`` ...). Invalid input raises
:class:`labbook.science.errors.ScienceInputError`, a :class:`ValueError`, whose message
names the argument at fault.
"""
