"""What users run around the pure core: the command line, regeneration, verify."""
