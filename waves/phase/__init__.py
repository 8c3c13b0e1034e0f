"""Phase mapping shared by the analyser and the simulator's ground truth.

- `waves.phase.analytic`: analytic signal along time (FFT based, optional
  band-pass in the same transform), phase and amplitude, delay embedding.
- `waves.phase.charge`: topological charge on 2x2 plaquettes (numba kernel and
  its numpy twin).

Charge convention: the phase winding counted counterclockwise as displayed
(row 0 at the top of the image).  With phase increasing in time, a core of
charge +1 rotates clockwise on screen.
"""
