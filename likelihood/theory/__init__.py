"""Theory: cosmology (background, growth, linear power) and the tracer kernel and multipoles."""
