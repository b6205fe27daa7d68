"""One module per command-line verb; each exposes add_parser(subparsers) and run(args) -> int."""
