"""One module per command-line verb (see :mod:`vidodo.cli_main`)."""

ORDER = ("demo", "grade", "report", "render", "register", "pick", "lens", "track", "odometry",
         "tune", "batch")
