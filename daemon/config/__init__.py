"""The configuration: the YAML file read strictly into typed settings.

Every room of the daemon imports these settings; this package imports nothing of the
daemon (only the driver names of :mod:`drivers.registry`, to validate them).
"""
