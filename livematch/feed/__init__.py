"""Position messages and replay logs: decoding, validation, reading and writing."""
