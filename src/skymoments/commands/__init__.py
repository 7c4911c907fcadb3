"""One module per ``skymoments`` subcommand; each exposes ``main()`` (a Hydra task)."""
