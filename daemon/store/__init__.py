"""The store: one SQLite file, its writer (the service's) and its read-only reader.

The reader is standard library only, so the operator's commands start fast; the
writer uses sqlite-utils and owns the schema and its migrations.
"""
