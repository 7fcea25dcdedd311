"""The running station: the service, the plan of a day, acquisition and the clock.

It drives the instruments through :mod:`drivers`, runs the science and writes the
store through its writer.
"""
