"""rigcast.commands: the command line: parsers, one library call per subcommand, the demo.

Modules: cli, cli_common, cli_offline, cli_live, demo, report.
"""
