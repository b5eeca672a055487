"""Tables of what code is specialised for and where it runs: storage layouts, scalars and targets."""
