"""Reading a finished run: curves, baselines, reports and exports."""
