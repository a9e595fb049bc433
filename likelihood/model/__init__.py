"""The likelihood model: one factory per config section, and the thin Gaussian likelihood."""
