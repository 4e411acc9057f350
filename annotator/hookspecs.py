"""The plugin contract: every hook annotator calls, with what it receives and returns.

Implement hooks with ``@annotator.hookimpl`` in a module, and list that module under the
``annotator`` entry-point group of your package::

    [project.entry-points.annotator]
    my_plugin = "my_package.my_module"

Hooks are always called with keyword arguments; an implementation may accept fewer arguments
than the spec names, so specs can grow without breaking plugins.
"""

from __future__ import annotations

import pluggy

hookspec = pluggy.HookspecMarker("annotator")
hookimpl = pluggy.HookimplMarker("annotator")


@hookspec
def register_annotators() -> list:
    """Return the annotator classes this plugin offers.

    :return: a list of subclasses of :class:`annotator.api.Annotator`. Their ``name`` must be
        unique across all plugins; the core refuses duplicates naming both plugins.
    """


@hookspec
def register_sql_functions(cosmology) -> list:
    """Return scalar SQL functions to install in every ``annotator query`` connection.

    :param cosmology: the :class:`annotator.cosmology.Cosmology` recorded in the manifest of the
        output being queried (so SQL on an old output uses the cosmology that annotated it).
    :return: a list of :class:`annotator.sql.SqlFunction`; names must be unique.
    """


@hookspec
def register_selections(manifest) -> list:
    """Return ready-made selections (named SQL snippets) for ``annotator query``.

    :param manifest: the output's manifest as a dict (columns present, bands, ...).
    :return: a list of :class:`annotator.sql.Selection`.
    """
