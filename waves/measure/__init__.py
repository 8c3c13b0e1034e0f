"""Measurements on phase fields: period, front speed, wavelength (and, later,
centres and territories).  Functions on arrays in pixels and frames; the
analysis layer converts to um, minutes and um/min with the stack's calibration.
"""
