"""The shrinkage stage: the hierarchical model, unit likelihood curves, sampling."""
