"""Files and formats: recordings, archives, packets."""
