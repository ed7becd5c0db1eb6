"""calibrate stage of volrecon."""
