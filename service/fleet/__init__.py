"""The fleet: which replica owns a channel, and reads of other replicas' channels."""
