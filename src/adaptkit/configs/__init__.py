"""Shipped hydra configs (a package so that hydra can find them inside an installed wheel)."""
