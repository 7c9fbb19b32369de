"""vidodo: check a mobile robot's odometry against video of the run."""

__version__ = "0.1.0"
