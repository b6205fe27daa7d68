"""The laser-safety caution shown before a real (non-simulated) bench opens its shutter."""

LASER_SAFETY_CAUTION = """\
LASER SAFETY — read before every unattended run
  * lightloom opens and closes a shutter on its own, unattended, for hours. Anyone entering the
    lab must know that the beam can come on at any moment.
  * lightloom is NOT an interlock and NOT a safety device. It closes the shutter on every way out
    it controls, but a crash of the computer or a kill -9 cannot: use a normally-closed shutter
    and a hardware interlock.
  * Wear the eye protection your laser requires, enclose the beam path, and follow the local laser
    safety officer, your local rules and the laser-safety standards (IEC 60825-1, ANSI Z136.1).
"""
