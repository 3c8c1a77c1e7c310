"""Growing a library: robust and diverse neighbours of the stored candidates
(:mod:`.neighbours`, on the chain kernel of :mod:`.kernel`), the held-out comparison of the
original and grown libraries (:mod:`.heldout`) and a planted test model (:mod:`.planted`)."""
