"""``streamcond circuit``: from a measured band to the resistors of a hardware comparator.

The software Schmitt trigger has an analog twin: a comparator (or op-amp) with positive
feedback, two or three resistors setting its thresholds. This package carries the band that
``tune`` measured into such a circuit: standard resistor values (IEC 60063 series), the
thresholds those real parts give, their worst case over the tolerances, and whether that worst
case still holds the measured noise (Rice's formula).

Modules, small and named for what they hold:

- :mod:`.eseries`    the IEC 60063 preferred-number series, and resistance text (``4k7``)
- :mod:`.networks`   the threshold formulas of each circuit (node equations), vectorised
- :mod:`.search`     the search of the series for the best pair or triple of values
- :mod:`.worstcase`  extreme-value (corner) analysis and Monte Carlo over the tolerances
- :mod:`.rcfilter`   an input RC filter matching the software prefilter
- :mod:`.evidence`   the one adapter to ``tune``: band, σ̂ and ν0 of a recording
- :mod:`.report`     the design as data (``--json``), as a table, and the verdict
- :mod:`.plot`       the schematic (schemdraw) and the transfer characteristic
- :mod:`.cli`        the argument parser and the command

Only :mod:`.cli` is imported by ``streamcond --help``, and it imports only the standard library.
"""
