"""pipeline.tools: the commands around the product (demo, verify, sweep and its theory, bench, batch).

Each tool uses only the public API of the product (:mod:`pipeline.chain`, re-exported by
:mod:`pipeline`) and the stage packages; nothing below imports from here.  The modules are imported
by the command line on demand (``from pipeline.tools._verify import run_verify``), so that one
subcommand never pays for another's imports.
"""
