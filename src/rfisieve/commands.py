"""Subcommands of the ``rfisieve`` command, for every module that registers one.

A module's ``register_cli(subparsers)`` builds its parser with :func:`add_command` and,
for plain options, :func:`add_options` (a table of flags and argparse keywords): the
parsers then read as data and share one shape.
"""


def add_command(subparsers, name, func, *, help, description, formatter=None, options=(), **more):
    """Add subcommand ``name`` running ``func(args)``; returns its parser (``more``: further
    keywords of ``add_parser``, such as ``epilog``)."""
    kwargs = {"help": help, "description": description, **more}
    if formatter is not None:
        kwargs["formatter_class"] = formatter
    p = subparsers.add_parser(name, **kwargs)
    add_options(p, options)
    p.set_defaults(func=func)
    return p


def add_options(parser, options):
    """``parser.add_argument(*flags, **keywords)`` for each ``(flags, keywords)`` row."""
    for flags, keywords in options:
        parser.add_argument(*((flags,) if isinstance(flags, str) else flags), **keywords)
    return parser
