"""pipeline.tools: the commands around the product (demo, verify, sweep and its theory, bench, batch, clock).

Each tool uses only the public API of the product (:mod:`pipeline.chain`, re-exported by
:mod:`pipeline`) and the stage packages; nothing below imports from here.
"""
