"""Sub-commands of the `vservo` command line tool.

Each module here defines ``register(subparsers)``, which adds one sub-command and sets
``func`` on its parser to a callable taking the parsed arguments and returning an exit code.
`vservo_node.cli` discovers the modules, so adding a command never touches a shared file.
"""
