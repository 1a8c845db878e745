"""placeholder"""
def add_parser(subparsers) -> None:
    pass
