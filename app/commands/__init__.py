"""The commands of `quietlayer` other than serve: one module each, with
`add_parser(commands)` (its options, on the argparse sub-parsers) and
`run(args)` (its exit code)."""
