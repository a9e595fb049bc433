"""The observation operator: window multipoles, k bins, window matrix and integral constraint,
observer term."""
