"""evenflag's Hydra launcher that runs jobs as Ray tasks (ray_launcher.py)."""
