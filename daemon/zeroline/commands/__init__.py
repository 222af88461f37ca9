"""One module per `zeroline` sub-command; `zeroline.cli` wires them to argparse."""
