"""The daemon side of chargebook, in rooms (see DEVELOPERS.md, "The map of acquire/").

From the top: ``commands``; ``daemon`` and ``replay``; ``reports``; ``engine``; ``session``;
``record``; then ``client``, ``processes`` and ``exit_codes``; ``protocol`` at the bottom. A room
imports only the rooms below it (an import-linter layers contract, checked by CI).
"""
