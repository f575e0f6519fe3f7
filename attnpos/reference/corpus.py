"""The reference models' training corpus: invented English documents with planted positional structure.

Everything here is generated from word lists and sentence patterns written for this project; nothing is copied
from anywhere. The generator is pure Python and deterministic: ``generate_documents(seed)`` gives the same
documents (and so the same sha256) on every machine.

Scenarios (each a document kind): a lighthouse keeper's log, a greenhouse bed inventory, ferry timetables and
notices, a bakery's order book, allotment-society minutes, a river gauge ledger, a repair shop's job cards,
and letters between two beekeepers.

The structure a position analysis can look for:

* **counting** — numbered entries, list items and steps (``Entry 7.``, ``3)``, ``Step 4:``), counted up
  within a document;
* **slots** — every document opens with a fixed-width header line (``<KIND> | no. 00412 | ... |``) so its
  fields sit at the same byte offsets from the document start; fixed-width ledger rows give column slots;
* **induction** — passages repeated verbatim later in the same document (a keeper copying an earlier note, a
  notice read out twice, a check code quoted again), plus random letter codes that appear twice;
* **varied sentence lengths** — sentences built from 1 to 6 clauses.
"""

from __future__ import annotations

import hashlib
import math
import random
from collections import Counter

CORPUS_SEED = 20240611
TARGET_BYTES = 2_300_000
#: every VAL_EVERY-th document is held out for validation
VAL_EVERY = 20

# ----------------------------------------------------------------------------------------------- word lists
_PLACE_A = ["Harrow", "Gull", "Tansy", "Marrow", "Fenwick", "Copper", "Lark", "Bramble", "Otter", "Heron",
            "Sedge", "Wren", "Pike", "Alder", "Quill", "Saltmarsh", "Thistle", "Clover", "Rook", "Nettle",
            "Barley", "Cinder", "Mallow", "Juniper", "Tern", "Flint", "Hazel", "Oriel", "Pebble", "Willow"]
_PLACE_B = ["Quay", "Point", "Isle", "Head", "Reach", "Cove", "Sound", "Ness", "Landing", "Strand",
            "Haven", "Rocks", "Bay", "Ferry", "Bridge", "Crossing", "Marsh", "Hollow", "Wharf", "Steps"]
_FIRST = ["Agnes", "Bram", "Cora", "Dafydd", "Elin", "Fergus", "Greta", "Hollis", "Ivo", "Jun", "Kasia",
          "Lorcan", "Maud", "Nils", "Orla", "Piet", "Quentin", "Rosa", "Soren", "Tilde", "Ulla", "Vikram",
          "Wanda", "Xavi", "Yusuf", "Zofia", "Amara", "Bertil", "Calla", "Dorian", "Esme", "Finn", "Hester",
          "Ines", "Jasper", "Kiri", "Linus", "Mirela", "Noor", "Osric", "Pernille", "Ravi", "Selma", "Tobiah"]
_LAST = ["Ashdown", "Birchall", "Crane", "Dunmore", "Everly", "Fairweather", "Gorse", "Holloway", "Inchbald",
         "Jessop", "Kettering", "Lowther", "Merriman", "Nightingale", "Oakes", "Penhallow", "Quarles",
         "Rushworth", "Stainton", "Tregarthen", "Underhill", "Vosper", "Whitlock", "Yardley", "Zennor"]
_WEEKDAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]
_MONTHS = ["January", "February", "March", "April", "May", "June", "July", "August", "September", "October",
           "November", "December"]
_WIND_DIR = ["N", "NE", "E", "SE", "S", "SW", "W", "NW"]
_SEA = ["calm", "slight", "moderate", "rough", "heavy", "glassy", "choppy"]
_SKY = ["clear", "overcast", "broken cloud", "fog bank", "drizzle", "squalls", "haze", "low cloud"]
_LAMP_TASKS = ["trimmed the wick", "polished the lens", "wound the clockwork", "refilled the oil reservoir",
               "cleaned the lantern glass", "checked the fog signal", "oiled the rotation bearings",
               "replaced a cracked pane", "logged the passing vessels", "painted the gallery rail"]
_VESSELS = ["Marten", "Dunlin", "Saltwren", "Cormorant", "Little Hope", "Brightwater", "Kittiwake",
            "Lantern Girl", "Plover", "Sea Thrift", "Grey Mare", "Morning Star", "Ember", "Curlew"]
_PLANTS = ["tomato", "pepper", "basil", "lettuce", "bean", "squash", "aubergine", "chard", "kale", "cucumber",
           "melon", "marigold", "sweet pea", "coriander", "dill", "fennel", "leek", "celeriac", "radish", "okra"]
_VARIETY_A = ["Red", "Golden", "Early", "Late", "Dwarf", "Giant", "Striped", "Silver", "Purple", "Winter",
              "Summer", "Lady", "Captain", "Northern", "Velvet", "Amber", "Coral", "Ivory", "Jade", "Rustic"]
_VARIETY_B = ["Alder", "Lantern", "Comet", "Button", "Ribbon", "Marvel", "Harbour", "Meadow", "Thimble",
              "Whistle", "Kestrel", "Sparrow", "Beacon", "Pocket", "Crown", "Saddle", "Feather", "Moon"]
_STATUS = ["germinating", "pricked out", "potted on", "hardening off", "flowering", "fruiting", "cropping",
           "resting", "needs staking", "aphids spotted", "watered", "cleared"]
_BREADS = ["rye loaf", "seeded batch", "cardamom knot", "plain cob", "oat bap", "fruit bun", "spelt tin",
           "onion roll", "honey plait", "walnut boule", "cheese scone", "sourdough round", "milk loaf",
           "poppy twist", "treacle bread", "almond slice"]
_ALLOT_TOPICS = ["the water trough by plot 9", "the shared shed roof", "the compost bays", "the spring seed swap",
                 "the autumn show", "the gate padlock", "rabbit fencing", "the rota for mowing the paths",
                 "the waiting list", "the manure delivery", "the noticeboard", "the wildflower strip"]
_RIVERS = ["Wendle", "Orrin", "Tamsey", "Callow", "Brisk", "Lune Minor", "Skell", "Ouseburn", "Penny Brook"]
_REPAIR_ITEMS = ["kettle", "bicycle", "wall clock", "radio", "sewing machine", "lawnmower", "table lamp",
                 "toaster", "umbrella", "accordion", "typewriter", "garden chair", "record player", "fan heater"]
_REPAIR_FAULTS = ["will not switch on", "makes a grinding noise", "leaks at the base", "loses time",
                  "has a loose handle", "sparks at the plug", "jams after a minute", "squeaks when turned",
                  "has a bent spoke", "hums but does nothing", "smells of burning", "has a torn seam"]
_REPAIR_FIXES = ["replaced the fuse", "cleaned the contacts", "fitted a new washer", "trued the wheel",
                 "re-glued the joint", "oiled the gears", "rewired the plug", "tightened the spindle",
                 "stitched the seam", "swapped the drive belt", "reset the escapement", "soldered a lead"]

# sentence material (subjects, verbs, objects, closing clauses) — generic enough to fit several scenarios
_SUBJ = ["the morning", "the tide", "the wind", "a small boat", "the postman", "a heron", "the neighbour",
         "a visitor from the mainland", "the old dog", "the cat from the chandlery", "my assistant",
         "a child from the school", "a flock of starlings", "the delivery van", "the inspector",
         "the rain", "a stranger with a map", "the harbourmaster", "the baker's boy", "the ferryman"]
_VERB = ["arrived early", "stayed until noon", "passed without a word", "came back twice",
         "left a parcel by the door", "asked about the weather", "brought news of the fair",
         "circled the point", "lingered by the wall", "went on towards the village", "was later than usual",
         "settled on the roof", "knocked at the gate", "waited under the awning", "turned back at the bridge"]
_CLAUSE = ["and nobody seemed to mind", "though the light was already fading", "which surprised us all",
           "as it does most weeks", "because the road was flooded", "while the kettle boiled",
           "so we made a note of it", "but the gulls were louder", "before the bell rang",
           "after the second delivery", "although it had been promised for Tuesday", "and then it went quiet",
           "which is worth remembering", "as the clock struck the half hour", "until the rain eased off",
           "and we counted them twice", "so the book was left open", "even though the gate was locked"]
_SHORT = ["Quiet day.", "Nothing to add.", "All well.", "Rain again.", "Busy.", "Fog by evening.",
          "A good day.", "Tired now.", "More tomorrow.", "Slow going.", "No visitors.", "Bright and cold."]
_LETTERS = "ABCDEFGHJKLMNPQRSTUVWXYZ"


def _name(r: random.Random) -> str:
    return f"{r.choice(_FIRST)} {r.choice(_LAST)}"


def _place(r: random.Random) -> str:
    return f"{r.choice(_PLACE_A)} {r.choice(_PLACE_B)}"


def _code(r: random.Random, n: int | None = None) -> str:
    return "".join(r.choice(_LETTERS) for _ in range(n or r.randint(5, 9)))


def _sentence(r: random.Random) -> str:
    """One sentence of 1 to 6 clauses (so sentence lengths vary from a few words to several lines)."""
    if r.random() < 0.15:
        return r.choice(_SHORT)
    n = min(6, 1 + int(r.expovariate(0.8)))
    parts = [f"{r.choice(_SUBJ)} {r.choice(_VERB)}"]
    for _ in range(n - 1):
        parts.append(r.choice(_CLAUSE))
    s = ", ".join(parts) if n > 2 else " ".join(parts)
    return s[0].upper() + s[1:] + "."


def _paragraph(r: random.Random, lo: int = 2, hi: int = 6) -> str:
    return " ".join(_sentence(r) for _ in range(r.randint(lo, hi)))


def _header(kind: str, number: int, a: str, b: str) -> str:
    """Fixed-width header line: every field starts at the same byte offset in every document (slots)."""
    return f"{kind:<10}| no. {number:05d} | {a[:22]:<22} | {b[:18]:<18} |\n"


def _date(r: random.Random) -> tuple[str, int, int]:
    month = r.randrange(12)
    day = r.randint(1, 28)
    return f"{day} {_MONTHS[month]}", month, day


def _time(r: random.Random) -> str:
    return f"{r.randint(0, 23):02d}:{r.choice([0, 5, 10, 15, 20, 25, 30, 35, 40, 45, 50, 55]):02d}"


# ----------------------------------------------------------------------------------------------- scenarios
def _lighthouse(r: random.Random, number: int) -> str:
    station = _place(r)
    keeper = _name(r)
    out = [_header("LIGHTLOG", number, station + " light", "keeper " + keeper.split()[1])]
    out.append(f"Keeper: {keeper}. Season begins {_date(r)[0]}.\n\n")
    notes: list[str] = []
    day = r.randint(1, 40)
    for entry in range(1, r.randint(6, 16) + 1):
        lit, out_ = f"{r.randint(16, 21):02d}:{r.randint(0, 59):02d}", f"{r.randint(4, 7):02d}:{r.randint(0, 59):02d}"
        line = (f"Entry {entry}. Day {day}. Wind {r.choice(_WIND_DIR)} {r.randint(2, 40)} knots, sea "
                f"{r.choice(_SEA)}, sky {r.choice(_SKY)}. Lamp lit {lit}, out {out_}.")
        tasks = r.sample(_LAMP_TASKS, r.randint(1, 3))
        line += " " + "; ".join(t[0].upper() + t[1:] if i == 0 else t for i, t in enumerate(tasks)) + "."
        if r.random() < 0.5:
            line += " " + _paragraph(r, 1, 4)
        if notes and r.random() < 0.3:
            k = r.randrange(len(notes))
            line += f" Copied again from an earlier page: {notes[k]}"
        elif r.random() < 0.4:
            note = _paragraph(r, 1, 3)
            notes.append(note)
        if r.random() < 0.25:
            vessels = r.sample(_VESSELS, r.randint(2, 5))
            line += " Vessels seen:\n" + "".join(f"  {i}) {v}, heading {r.choice(_WIND_DIR)}\n"
                                                 for i, v in enumerate(vessels, 1))
        out.append(line.rstrip() + "\n")
        day += 1
    return "".join(out)


def _greenhouse(r: random.Random, number: int) -> str:
    house = f"House {r.choice('ABCDEFG')}{r.randint(1, 9)}"
    out = [_header("GREENHOUSE", number, house + " inventory", "checked " + _date(r)[0])]
    out.append("BED | PLANT        | VARIETY            | TRAYS | STATUS\n")
    rows = []
    for bed in range(1, r.randint(8, 22) + 1):
        variety = f"{r.choice(_VARIETY_A)} {r.choice(_VARIETY_B)}"
        row = (f"{bed:03d} | {r.choice(_PLANTS):<12} | {variety:<18} | {r.randint(1, 40):>5} | "
               f"{r.choice(_STATUS)}\n")
        rows.append(row)
        out.append(row)
    out.append("\nNotes:\n")
    for i in range(1, r.randint(2, 6) + 1):
        out.append(f"{i}. {_sentence(r)}\n")
    if rows and r.random() < 0.6:
        pick = r.sample(rows, min(len(rows), r.randint(1, 3)))
        out.append("Beds to recheck next week (rows copied from above):\n" + "".join(pick))
    return "".join(out)


def _ferry(r: random.Random, number: int) -> str:
    a, b = _place(r), _place(r)
    route = r.randint(1, 12)
    out = [_header("FERRY", number, f"route {route}", _WEEKDAYS[r.randrange(7)] + " sailings")]
    out.append(f"Route {route}: {a} to {b}. Vessel: {r.choice(_VESSELS)}.\n")
    h, m = r.randint(5, 8), r.choice([0, 10, 15, 20, 30, 45])
    crossing = r.randint(15, 70)
    for sailing in range(1, r.randint(5, 14) + 1):
        dep = h * 60 + m
        arr = dep + crossing
        out.append(f"  Sailing {sailing:>2}  dep {dep // 60:02d}:{dep % 60:02d}  arr {arr // 60 % 24:02d}:{arr % 60:02d}"
                   f"  {'calls at ' + _place(r) if r.random() < 0.2 else 'direct'}\n")
        step = r.choice([40, 60, 60, 90, 120])
        h, m = divmod(dep + step, 60)
        if h > 22:
            break
    notice = (f"Notice: passengers for {b} with bicycles should board by the stern ramp. "
              + _paragraph(r, 1, 3))
    out.append("\n" + notice + "\n")
    if r.random() < 0.5:
        out.append(_paragraph(r, 2, 5) + "\n")
    code = _code(r)
    out.append(f"Timetable check code {code}.\n")
    if r.random() < 0.7:
        out.append("The notice is repeated for the evening boats. " + notice + "\n")
    out.append(f"Quote code {code} when asking about these times.\n")
    return "".join(out)


def _bakery(r: random.Random, number: int) -> str:
    day = _WEEKDAYS[r.randrange(7)]
    out = [_header("ORDERBOOK", number, f"page {r.randint(1, 300)}", day + " orders")]
    standing = []
    n_orders = r.randint(4, 12)
    for order in range(1, n_orders + 1):
        oid = r.randint(1000, 9999)
        cust = _name(r)
        items = r.sample(_BREADS, r.randint(1, 5))
        lines = "".join(f"    {i}. {r.randint(1, 12)} x {it}\n" for i, it in enumerate(items, 1))
        block = f"Order #{oid} for {cust}, collect {day} {_time(r)}.\n{lines}"
        if r.random() < 0.3:
            block += "    Note: " + _sentence(r) + "\n"
        out.append(block)
        if r.random() < 0.35:
            standing.append(block)
    if standing:
        out.append("\nStanding orders, copied out again for next week:\n")
        out.extend(standing)
    out.append(f"\nTotal orders: {n_orders}. " + _paragraph(r, 0, 2) + "\n")
    return "".join(out)


def _minutes(r: random.Random, number: int) -> str:
    society = f"{r.choice(_PLACE_A)} Allotment Society"
    out = [_header("MINUTES", number, society, "meeting " + _date(r)[0])]
    chair = _name(r)
    present = [_name(r) for _ in range(r.randint(3, 8))]
    out.append(f"Chair: {chair}. Present: {', '.join(present)}.\n\n")
    motions = []
    for item in range(1, r.randint(4, 10) + 1):
        topic = r.choice(_ALLOT_TOPICS)
        text = f"Item {item}: {topic[0].upper() + topic[1:]}. {_paragraph(r, 1, 5)}"
        if r.random() < 0.4:
            motion = f"Motion: that {topic} be dealt with by {r.choice(present)} before the next meeting."
            text += " " + motion
            motions.append(motion)
        if r.random() < 0.3:
            actions = [f"{r.choice(present).split()[0]} to {r.choice(['write to', 'ask', 'visit', 'phone'])} "
                       f"{r.choice(['the council', 'the landowner', 'the seed merchant', 'plot holders'])}"
                       for _ in range(r.randint(2, 4))]
            text += "\nActions:\n" + "".join(f"  ({chr(97 + k)}) {a}\n" for k, a in enumerate(actions))
        out.append(text.rstrip() + "\n")
    if motions:
        out.append("\nMotions read back before closing:\n")
        out.extend(f"{k}. {m}\n" for k, m in enumerate(motions, 1))
    out.append(f"Meeting closed at {_time(r)}. {r.choice(_SHORT)}\n")
    return "".join(out)


def _gauge(r: random.Random, number: int) -> str:
    river = r.choice(_RIVERS)
    station = _place(r)
    out = [_header("GAUGE", number, f"{river} at {station}", "readings " + _date(r)[0])]
    out.append("READING  TIME   LEVEL_M  FLOW   REMARK\n")
    level = r.uniform(0.3, 2.5)
    minute = r.randint(0, 6 * 60)
    every = r.choice([30, 60, 60, 90, 120])
    for k in range(1, r.randint(10, 30) + 1):
        level = max(0.05, level + r.gauss(0, 0.08))
        remark = r.choice(["steady", "rising", "falling", "debris", "ice at edge", "gauge cleaned", "-", "-", "-"])
        clock = f"{minute // 60 % 24:02d}:{minute % 60:02d}"
        out.append(f"{k:>7}  {clock}  {level:7.2f}  {r.randint(1, 90):>4}   {remark}\n")
        minute += every
    out.append("\n" + _paragraph(r, 1, 4) + "\n")
    return "".join(out)


def _repair(r: random.Random, number: int) -> str:
    out = [_header("JOBCARD", number, "bench " + str(r.randint(1, 6)), "repairer " + r.choice(_FIRST))]
    for job in range(1, r.randint(3, 8) + 1):
        item, fault = r.choice(_REPAIR_ITEMS), r.choice(_REPAIR_FAULTS)
        tag = _code(r, 6)
        fixes = r.sample(_REPAIR_FIXES, r.randint(1, 4))
        out.append(f"Job {job}. Tag {tag}. A {item} that {fault}. Owner: {_name(r)}.\n")
        out.extend(f"  Step {s}: {f}.\n" for s, f in enumerate(fixes, 1))
        if r.random() < 0.4:
            out.append("  " + _sentence(r) + "\n")
        out.append(f"  Returned with tag {tag}.\n")
    return "".join(out)


def _letter(r: random.Random, number: int) -> str:
    writer, reader = _name(r), _name(r)
    out = [_header("LETTER", number, "to " + reader, "from " + writer.split()[0])]
    out.append(f"Dear {reader.split()[0]},\n\n")
    paras = [_paragraph(r, 2, 7) for _ in range(r.randint(2, 5))]
    hives = r.randint(2, 9)
    paras.insert(1, f"The {hives} hives are " + r.choice(["busy", "quiet", "heavy with honey", "restless"]) +
                 ". " + "".join(f"Hive {h} " + r.choice(["swarmed", "is calm", "needs a new queen",
                                                         "has a full super", "was robbed"]) + ". "
                                for h in range(1, hives + 1)).rstrip())
    if r.random() < 0.5:
        k = r.randrange(len(paras))
        paras.append("You asked me to repeat what I said last time, so here it is again: " + paras[k])
    out.append("\n\n".join(paras) + "\n\n")
    out.append(f"Yours, from the hives,\n{writer.split()[0]}\n")
    return "".join(out)


SCENARIOS = {
    "lighthouse-log": _lighthouse,
    "greenhouse-inventory": _greenhouse,
    "ferry-timetable": _ferry,
    "bakery-orders": _bakery,
    "allotment-minutes": _minutes,
    "river-gauge": _gauge,
    "repair-jobcards": _repair,
    "beekeeper-letters": _letter,
}


def generate_documents(seed: int = CORPUS_SEED, target_bytes: int = TARGET_BYTES) -> list[str]:
    """Deterministic list of documents totalling at least ``target_bytes`` UTF-8 bytes."""
    r = random.Random(int(seed))
    kinds = list(SCENARIOS)
    docs: list[str] = []
    total = 0
    number = 1
    while total < target_bytes:
        kind = kinds[r.randrange(len(kinds))]
        doc = SCENARIOS[kind](r, number)
        docs.append(doc)
        total += len(doc.encode("utf-8"))
        number += 1
    return docs


def corpus_text(docs: list[str]) -> str:
    """The documents as one text (blank line between documents); hashed for the training record."""
    return "\n".join(docs)


def corpus_sha256(docs: list[str]) -> str:
    return hashlib.sha256(corpus_text(docs).encode("utf-8")).hexdigest()


def split_documents(docs: list[str]) -> tuple[list[str], list[str]]:
    """(train, validation): every ``VAL_EVERY``-th document is held out."""
    train = [d for i, d in enumerate(docs) if i % VAL_EVERY != VAL_EVERY - 1]
    val = [d for i, d in enumerate(docs) if i % VAL_EVERY == VAL_EVERY - 1]
    return train, val


def unigram_entropy(docs: list[str]) -> float:
    """Entropy of the byte distribution (nats per byte): the loss of the best model that ignores context."""
    counts = Counter()
    for d in docs:
        counts.update(d.encode("utf-8"))
    n = sum(counts.values())
    return -sum(c / n * math.log(c / n) for c in counts.values())
