"""equitheta scoring service (FastAPI); see DESIGN.md. Imports calibration, never the reverse."""
