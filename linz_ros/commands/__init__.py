"""The verbs of the ``linz`` command as functions: typed arguments in, typed results out.

One module per verb (``check``, ``build``, ``sim``, ``logs``, ``keygen``, ``bench``,
``demo``); each has a public function that does the work and returns what it found and
wrote, and a function that renders that as the text the verb prints. The command line
(:mod:`linz_ros.cli`) only parses, calls, prints and chooses the exit code; the demo
calls the same functions. Helpers several verbs share live in ``_common`` (bundled
files, loading a plant file or an artifact, terminal-safe text) and ``_options`` (the
text of design and run options turned into values, errors named by option).

This layer sits on top, beside the command line: it may import both towers.
"""
