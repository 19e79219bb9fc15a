"""The case-mix stage: the risk model, its validation, and the one benchmark."""
