"""Loop records: YAML -> validated, frozen :class:`~loopvet.record.model.Record`."""
