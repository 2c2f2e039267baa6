"""Vigil: closed-loop trial scheduler for live animal conditioning sessions.

The packages are layers, lowest first; a module imports only from its own package and from
lower layers, and the packages sharing a layer know nothing of each other
(tests/test_layers.py checks every import against this list).
"""

LAYERS: tuple[tuple[str, ...], ...] = (
    ("protocol",),  # the YAML protocol language: load, validate, compile
    ("engine",),  # the sans-I/O session core and its drivers
    ("link", "models", "rules"),  # box links; learning models; closed-loop rules
    ("store",),  # the database: schema, writer, queries
    ("lab", "export"),  # composition: supervisor, assembly ...; data out in open formats (NWB)
    ("web",),  # the status page's process
    ("cli",),  # the `vigil` verbs
)
