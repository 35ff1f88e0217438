"""Generate the bundled demo corpus for ``nextword``.

Why this exists: the README demo and the example scripts need a realistic,
freely redistributable text to train a bigram next-word model on.  Rather
than shipping anyone's real messages, this script invents one: the group-chat
history of "Harbor Lane Bike Workshop", a fictional community bicycle repair
co-op.  Every person, place and event in it is made up.

The text comes from a small template grammar with slots.  Recurring phrases
("see you at the workshop", "can someone bring", "repair night on Thursday")
give the bigram model something meaningful to learn, while names, places and
days keep their capitals so case-preserving display can be tested.

The output is deterministic: the same ``--seed`` and ``--count`` produce a
byte-for-byte identical file on any Python >= 3.10.  Standard library only.

Usage::

    python examples/make_demo_corpus.py [--count N] [--seed S] [-o PATH]
"""

from __future__ import annotations

import argparse
import os
import random
import re
import sys
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path

DEFAULT_COUNT = 5000
DEFAULT_SEED = 20240521
DEFAULT_OUTPUT = Path(__file__).resolve().parent.parent / "examples" / "data" / "demo_messages.txt"

# --- Vocabulary -------------------------------------------------------------
# Lists are ordered roughly by how often they should appear; ``zipf`` turns
# that order into 1/rank weights so a few items dominate, as in real chats.

NAMES = ("Priya", "Tomasz", "Ines", "Gideon", "Maren", "Kofi",
         "Saoirse", "Bram", "Yusuf", "Delphine", "Hattie", "Arjun")
PLACES = ("Harbor Lane", "Fenwick Park", "Quarry Hill", "the Old Mill path",
          "Linden Square", "the canal towpath", "Saltmarsh Road", "the Ferry Steps",
          "Wharf Street", "Gullbridge", "Heron Point")
VENUES = ("the Co-op Hall", "St Aldric's school", "the Copper Kettle cafe", "Fenwick Park")
DAYS = ("Thursday", "Saturday", "Sunday", "Tuesday", "Wednesday", "Friday", "Monday")
TIMES = ("7:30", "6pm", "10am", "6:45", "7pm", "9:30", "half seven", "noon", "8:15", "11am")
MONTHS = ("May", "April", "June", "March")
WEATHER = ("dry", "grim", "lovely", "windy", "wet", "perfect", "cold but sunny")
TOOLS = ("the truing stand", "the chain tool", "the tyre levers", "the track pump",
         "the cone spanners", "the torque wrench", "the spoke key", "the cable cutters",
         "the work stand", "the bottom bracket tool", "the headset press", "the Allen keys")
BIKES = ("the green loaner", "the red hybrid", "the kids' BMX", "the tandem",
         "loaner number 4", "the old road bike", "the cargo bike", "the yellow folder",
         "{name}'s commuter", "the donated mountain bike")
EVENTS = ("the spring group ride", "the fundraiser", "the kids' bike clinic",
          "the volunteer meeting", "the parts sale", "the open day")
SUPPLIERS = ("Kestrel Parts Co", "Tidewell Cycle Supply", "the Gullbridge wholesaler")
FIXES = ("brakes", "gears", "back wheel", "puncture", "chain", "headset", "front hub")
# (plain plural, counted singular, counted plural, smallest count, largest count)
PARTS = (
    ("tubes", "tube", "tubes", 2, 20),
    ("spokes", "spoke", "spokes", 6, 36),
    ("brake pads", "set of brake pads", "sets of brake pads", 2, 12),
    ("chains", "chain", "chains", 2, 10),
    ("brake cables", "brake cable", "brake cables", 4, 20),
    ("tyres", "tyre", "tyres", 2, 12),
    ("gear cables", "gear cable", "gear cables", 4, 20),
    ("rear derailleurs", "rear derailleur", "rear derailleurs", 1, 4),
    ("cassettes", "cassette", "cassettes", 1, 6),
    ("bottom brackets", "bottom bracket", "bottom brackets", 1, 4),
    ("pedals", "pair of pedals", "pairs of pedals", 2, 8),
    ("saddles", "saddle", "saddles", 1, 6),
    ("mudguards", "set of mudguards", "sets of mudguards", 1, 5),
    ("bells", "bell", "bells", 3, 15),
)


def zipf(n: int) -> list[float]:
    """1/rank weights for a list of length ``n``."""
    return [1.0 / rank for rank in range(1, n + 1)]


# --- Templates ----------------------------------------------------------------
# ``{slot}`` markers are filled per message.  A trailing digit ("{place2}")
# draws from the same family but never repeats a value already used in the
# message.  Earlier templates in each list are picked more often.

QUESTIONS = (
    "Can someone bring {tool} to repair night on Thursday?",
    "Can someone bring a few spare {parts} on {day}?",
    "Does anyone know where {tool} went?",
    "Is anyone around on {day} to open up the workshop?",
    "Is the workshop open on {day}?",
    "Are we still on for the ride to {place} on {day}?",
    "What time are we meeting at {place}?",
    "How many {parts} do we have left?",
    "Has anyone seen {tool}? Not on the wall again.",
    "Can I borrow a loaner bike for the weekend?",
    "Did anyone fix {bike} yet?",
    "{name}, are you coming to {event}?",
    "Should we order more {parts} before {event}?",
    "Any chance someone can cover repair night on Thursday? I'm away.",
    "Who's doing the rota for {event}?",
    "Is it too wet for the ride on {day}?",
    "Can someone show me how to true a wheel on {day}?",
    "Does {name} still have the key for the back room?",
)
PLANS = (
    "I'll be at the workshop from {time} on {day}.",
    "Repair night on Thursday starts at {time}, see you at the workshop!",
    "We'll meet at {place} at {time} and ride over to {place2} together.",
    "Let's do the spring group ride on {day}, leaving {place} at {time}.",
    "I'm going to order {nparts} for {event}.",
    "{name} and I will run the kids' bike clinic on {day} morning.",
    "I can open up at {time} if someone else can lock up.",
    "I'm bringing {tool} back on {day}.",
    "We're planning the fundraiser for {month} at {venue}.",
    "I'll take {bike} out for a test ride after {time}.",
    "{name} is leading the ride from {place} to {place2} on {day}.",
    "I'm going to sort the parts shelf on {day} if anyone wants to help.",
    "Let's meet at the workshop at {time} and ride to {place} from there.",
    "If it rains we'll just meet at the workshop instead.",
)
THANKS = (
    "Thanks for fixing {bike}, {name}!",
    "Thanks for fixing my {fix}, it rides like new.",
    "Thanks so much for sorting the parts order, {name}.",
    "Huge thanks to everyone who came to {event}!",
    "Thanks {name}, you're a star.",
    "Thanks for bringing {tool}!",
    "Thanks for lending me {bike} on {day}.",
    "Thanks to {name} & {name2} for running the kids' bike clinic.",
)
REMINDERS = (
    "Reminder: repair night on Thursday from {time} at the workshop.",
    "Just a reminder that {event} is on {day}.",
    "Don't forget to put {tool} back on the wall.",
    "Please sign the loaner bike book when you take one out.",
    "Don't forget the kids' bike clinic on {day} at {venue}.",
    "Reminder that the workshop is closed on {day}.",
    "Please log any parts you use in the parts book.",
    "Don't forget helmets + lights for the ride on {day}.",
    "Reminder: subs are {price} a month, cash or card at the workshop.",
)
STATUS = (
    "{bike} needs new {parts} before it goes out again.",
    "The parts order from {supplier} arrived: {nparts}, {nparts2} & {nparts3}.",
    "We've got {nparts} left in the back room.",
    "Something's up with {tool} again, I've put a note on it.",
    "Fixed {small} punctures tonight, not bad!",
    "We raised {amount} at the fundraiser, thank you all!",
    "{bike} is ready to go out on loan.",
    "Nobody's using {tool} tonight if anyone needs it.",
    "I'm running late, be there by {time}.",
    "Just finished truing the back wheel on {bike}.",
    "The weather looks {weather} for {day}.",
    "It's pouring down at {place}, might skip the ride.",
    "I've put some spare {parts} in the box by the door, {price} each.",
    "{name} fixed {small} bikes at the clinic, amazing.",
    "{place} is flooded again, go round by {place2}.",
)
REPLIES = (
    "Sounds good!", "See you there!", "Sounds good, see you there.", "I'm in.",
    "I'll be there.", "Great, thanks {name}!", "No worries.", "See you at the workshop.",
    "Works for me.", "Nice one!", "I can do {day}.", "Can't make it this week, sorry.",
    "Count me in + I can bring {tool}.", "Yes please!", "On my way.",
    "Good shout {name}.", "I don't mind, whatever works.", "Ha, fair enough.",
    "I'm happy to help on {day}.", "Brilliant, thank you!",
)
# Replies whose first letter can be typed in lowercase ("sounds good").
CASUAL = frozenset(("Sounds good!", "See you there!", "Sounds good, see you there.",
                    "No worries.", "Works for me.", "Nice one!", "Yes please!",
                    "On my way.", "Ha, fair enough."))
OPENERS = ("Hi all!", "Morning everyone.", "Hey folks.", "Quick one.",
           "Hi {name}!", "Evening all.", "Right then.", "Update from the workshop.")
CLOSERS = ("Thanks!", "Cheers.", "Let me know.", "See you Thursday!",
           "Thanks in advance.", "See you at the workshop.", "Cheers, {name}.",
           "Let me know if you can't make it.")

SENTENCE_KINDS: dict[str, Sequence[str]] = {
    "question": QUESTIONS, "plan": PLANS, "status": STATUS,
    "reminder": REMINDERS, "thanks": THANKS,
}
KIND_WEIGHTS = (30, 25, 22, 12, 11)

SLOT_RE = re.compile(r"\{([a-z]+?)(\d*)\}")


class Filler:
    """Fills ``{slot}`` markers for one message, avoiding repeated values."""

    def __init__(self, rng: random.Random) -> None:
        self.rng = rng
        self.used: dict[str, set[str]] = {}
        self.handlers: dict[str, Callable[[], str]] = {
            "name": lambda: self._pick("name", NAMES),
            "place": lambda: self._pick("place", PLACES),
            "venue": lambda: self._pick("venue", VENUES),
            "day": lambda: self._pick("day", DAYS),
            "time": lambda: self._pick("time", TIMES),
            "month": lambda: self._pick("month", MONTHS),
            "weather": lambda: self._pick("weather", WEATHER),
            "tool": lambda: self._pick("tool", TOOLS),
            "bike": lambda: self.fill(self._pick("bike", BIKES)),
            "event": lambda: self._pick("event", EVENTS),
            "supplier": lambda: self._pick("supplier", SUPPLIERS),
            "fix": lambda: self._pick("fix", FIXES),
            "parts": lambda: self._part()[0],
            "nparts": self._counted_part,
            "small": lambda: str(rng.randint(2, 14)),
            "price": lambda: f"£{rng.choice((3, 4, 5, 6, 8, 10, 12, 15, 20))}",
            "amount": lambda: f"£{rng.randint(12, 95) * 10}",
        }

    def _pick(self, family: str, options: Sequence[str]) -> str:
        used = self.used.setdefault(family, set())
        weights = zipf(len(options))
        for _ in range(20):
            value = self.rng.choices(options, weights)[0]
            if value not in used:
                break
        used.add(value)
        return value

    def _part(self) -> tuple[str, str, str, int, int]:
        plain = [p[0] for p in PARTS]
        return PARTS[plain.index(self._pick("part", plain))]

    def _counted_part(self) -> str:
        _, singular, plural, low, high = self._part()
        count = self.rng.randint(low, high)
        return f"{count} {singular if count == 1 else plural}"

    def fill(self, template: str) -> str:
        def replace(match: re.Match[str]) -> str:
            return self.handlers[match.group(1)]()

        return SLOT_RE.sub(replace, template)


def capitalise(sentence: str) -> str:
    """Upper-case the first letter (slots like ``{bike}`` start lower-case)."""
    return sentence[:1].upper() + sentence[1:]


def weighted(rng: random.Random, options: Sequence[str]) -> str:
    return rng.choices(options, zipf(len(options)))[0]


def make_message(rng: random.Random) -> str:
    """Build one chat message of one to four sentences."""
    filler = Filler(rng)
    parts: list[str] = []
    if rng.random() < 0.24:
        reply = weighted(rng, REPLIES)
        text = filler.fill(reply)
        if reply in CASUAL and rng.random() < 0.35:
            text = text[0].lower() + text[1:]
        parts.append(text)
        if rng.random() < 0.3:
            kind = rng.choices(("plan", "status", "question"), (3, 2, 2))[0]
            parts.append(capitalise(filler.fill(weighted(rng, SENTENCE_KINDS[kind]))))
    else:
        if rng.random() < 0.25:
            parts.append(filler.fill(weighted(rng, OPENERS)))
        kinds = rng.choices(list(SENTENCE_KINDS), KIND_WEIGHTS, k=2)
        parts.append(capitalise(filler.fill(weighted(rng, SENTENCE_KINDS[kinds[0]]))))
        if rng.random() < 0.3 and kinds[1] != kinds[0]:
            parts.append(capitalise(filler.fill(weighted(rng, SENTENCE_KINDS[kinds[1]]))))
        if rng.random() < 0.2:
            parts.append(filler.fill(weighted(rng, CLOSERS)))
    message = " ".join(parts)
    if rng.random() < 0.07:  # some phones type curly apostrophes
        message = message.replace("'", "\u2019")
    return message


def generate(count: int, seed: int) -> list[str]:
    """Return ``count`` messages, deterministic for a given ``seed``."""
    rng = random.Random(seed)
    messages = [make_message(rng) for _ in range(count)]
    for message in messages:
        if not message.strip() or "\n" in message or "\t" in message or "\r" in message:
            raise AssertionError(f"bad message generated: {message!r}")
    return messages


def write_atomically(path: Path, lines: Sequence[str]) -> None:
    """Write ``lines`` to ``path`` via a temp file in the same directory."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as handle:
            handle.write("".join(line + "\n" for line in lines))
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp_name, 0o644)
        os.replace(tmp_name, path)
    except BaseException:
        Path(tmp_name).unlink(missing_ok=True)
        raise


def positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError("must be a positive integer")
    return value


def parse_args(argv: Sequence[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description="Generate the invented Harbor Lane Bike Workshop chat corpus.")
    parser.add_argument("--count", type=positive_int, default=DEFAULT_COUNT,
                        help=f"number of messages (default {DEFAULT_COUNT})")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED,
                        help=f"random seed (default {DEFAULT_SEED})")
    parser.add_argument("-o", "--output", type=Path, default=DEFAULT_OUTPUT,
                        help="output file (default examples/data/demo_messages.txt)")
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_args(argv)
    messages = generate(args.count, args.seed)
    try:
        write_atomically(args.output, messages)
    except OSError as exc:
        print(f"error: cannot write {args.output}: {exc}", file=sys.stderr)
        return 1
    words = sum(len(message.split()) for message in messages)
    print(f"wrote {len(messages)} messages ({words} words) to {args.output}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
