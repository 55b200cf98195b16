"""Processes, files, terminals and editors: sandbox, command line, language server, output formats."""
