"""The operator's commands: the parser, one module per command, errors and tables.

The read commands open the store through its read-only reader and never import
pvlib, pandas, scipy or sqlite-utils.
"""
