"""io stage of volrecon."""
