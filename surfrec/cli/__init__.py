"""The ``surfrec`` command line: one module per subcommand, a group in :mod:`main`."""
