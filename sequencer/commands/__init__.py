"""One module per command-line verb; each exposes add_parser(subparsers) and run(args) -> int; the only layer besides run/ that may import every other."""
