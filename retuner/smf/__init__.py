"""Standard MIDI Files: a strict, fast reader (:mod:`.reader`), the tempo map (:mod:`.tempo`),
channel messages to and from bytes (:mod:`.messages`) and a byte-exact writer (:mod:`.writer`).

Source for every layout here: "Standard MIDI Files 1.0" (MIDI Manufacturers Association).
"""
