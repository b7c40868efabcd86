"""CAN acquisition: bit layouts, frame decoding and the sources (log files, live buses)."""
