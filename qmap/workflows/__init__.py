"""One public function per command: files in, maps (or reports) out.

The command-line tools in :mod:`qmap.cli` parse options and call these.
"""
