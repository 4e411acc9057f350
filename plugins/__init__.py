"""The built-in annotators of annotator, installed as the package ``annotator_plugins``.

Each module is an ordinary plugin: it implements ``register_annotators`` with
``@annotator.hookimpl`` and is listed under the ``annotator`` entry-point group in
pyproject.toml, exactly as a third-party plugin would be. None of them is imported by the core.
"""
