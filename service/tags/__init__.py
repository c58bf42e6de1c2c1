"""Plant tags: one signal per topic, decoded into readings, and assembled into channel samples.

``registry`` (which tag a topic carries), ``tag_payload`` (a message into a value, time stamp and
quality), ``json_pointer`` (RFC 6901), ``tag_list`` (tags from a CSV file) and ``assembler`` (a sample
forms when a channel's output tag updates). ``tag_path`` joins them into the one lane the engine
and the offline tools feed tag messages through.
"""
