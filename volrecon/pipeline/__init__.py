"""pipeline stage of volrecon."""
