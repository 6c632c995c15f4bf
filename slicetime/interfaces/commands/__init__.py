"""The commands of ``slicetime``, one module each (``show``, ``audit``, ``verify``,
``correct``, ``fix``, ``timing``, ``explain``, ``demo``), and :mod:`.shared`: the
option groups, errors and helpers they share. The group in
:mod:`slicetime.interfaces.cli` imports a command's module only when it is used."""
