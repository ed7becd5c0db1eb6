"""simulate stage of volrecon."""
