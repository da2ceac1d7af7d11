"""The command line: main(argv) -> int, one module per command group."""
