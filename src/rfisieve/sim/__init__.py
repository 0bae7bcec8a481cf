"""Simulator of the demo observatory: receiver model (:mod:`.model`), emitters
(:mod:`.emitters`), noise draws (:mod:`.draw`), injection (:mod:`.inject`) and the scan and
night writers with the ``simulate`` command (:mod:`.scans`)."""
