"""The science: pure functions of solar geometry, air masses, extinction and the fit.

Nothing here reads the store, the clock or the commands; inputs come in as arguments
(the configuration's types, points, arrays) and results go out as values. numpy and
pvlib only, and pvlib only in the modules that need a solar position.
"""
