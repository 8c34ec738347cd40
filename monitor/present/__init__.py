"""What people read: the HTML report (:mod:`.report`) and its pictures (:mod:`.plots`), and the
command line's text tables (:mod:`.tables`)."""
