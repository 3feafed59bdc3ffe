"""Workflow glue: the settings parsed once, one entry point per rule, and job sizing."""
