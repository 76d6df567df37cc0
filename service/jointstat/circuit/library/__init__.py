"""The statistic library: shared blocks, one module per statistic family, and the name → statistic registry."""
