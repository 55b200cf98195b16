# ruff: noqa: B018  (bare attribute uses are how vulture reads an allow-list)
"""Names a dead-code scan (vulture) cannot see used, each with where it is used.

The scan runs in tests/server/test_dead_code.py; a name goes here only with its reason.
The file is never imported: vulture only reads the attribute uses below."""

_ = object
# Fields of the technology's [electrical] table: read by name, through getattr, by Electrical.sheet.
_.nwell_sheet, _.psub_sheet, _.pwell_sheet, _.deep_nwell_sheet
_.nwell_doping, _.nwell_depth, _.pwell_doping, _.pwell_depth, _.psub_doping, _.psub_depth
_.shape_count  # CapturedLayout.shape_count: tests/bench/bench_capture.py prints it
_.in_flight  # RunScheduler.in_flight: what tests/server/test_documents.py observes
_.dont_write_bytecode  # sys.dont_write_bytecode, set so the child writes no .pyc
_.new_cell  # capture_gdstk: replaces gdstk.Library.new_cell
_.__module__, _.__qualname__  # capture_gdstk: the wrapper keeps the wrapped method's names
_.tempdir  # tempfile.tempdir, pointed at the run folder
_.diagnostic_provider  # server capability read by pygls
_.report_server_error  # pygls's hook for errors inside handlers
_._stop_event  # LanguageServer._stop_event: what pygls's shutdown() sets to end the main loop (server/lsp/tcp.py)
# Protocol handlers, called by pygls through their @server.feature registration.
_.initialize, _.did_open, _.did_change, _.did_save, _.did_close
_.did_change_configuration, _.pull_diagnostics, _.code_action
_._start_io_async  # pygls's stdio server, replaced to frame with server/lsp/transport.py
_.__getattr__  # analyzers/rules/__init__.py: the module's PEP 562 hook that imports the rules on first use
_.render_text, _.render_json, _.render_sarif  # server/cli/main.py RENDERERS: imported by name when a report is written
