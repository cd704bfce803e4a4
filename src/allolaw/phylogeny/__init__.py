"""Shared ancestry: trees read from Newick, and linear-time Gaussian densities on them."""
