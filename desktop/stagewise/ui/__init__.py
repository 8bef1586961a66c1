"""The desktop program: Qt widgets over a document object and a background compute worker.

Nothing in this package does numerics: widgets show results that :mod:`stagewise.ui.worker`
obtains from :mod:`stagewise.engine`, and every edit goes through :mod:`stagewise.ui.document`
as an undoable command.
"""
