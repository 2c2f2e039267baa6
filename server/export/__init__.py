"""Data out in open formats: a session's database rows as NWB files (`vigil export --nwb`)."""
