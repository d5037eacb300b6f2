"""Network design before the field: precision and reliability of planned observations."""
