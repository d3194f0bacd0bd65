"""INVENTED demo data: the passenger inbox of an island ferry cooperative.

Everything here is made up by this module: the cooperative ("Saltgrass Island Ferries"), its
ports, vessels, passengers and every message. No real messages, people or companies are used.
The generator exists so that the demo and the tests have a stream with a known structure:

* eight themes (bookings and refunds, delays and cancellations, lost property, vehicles and
  freight, access and assistance, timetables, pets and animals, onboard services), each with its
  own vocabulary and sentence templates, plus filler words that every theme shares so that themes
  overlap the way real mail does;
* several simulated days whose theme mix drifts (summer timetables, a festival weekend);
* a storm day that swells the delays and cancellations theme;
* a burst of junk (spam-like) messages that should not be learned from.

It is deterministic: the same seed gives the same messages, in the same order.
"""

from __future__ import annotations

import random
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

INVENTED_NOTICE = (
    "INVENTED DATA: Saltgrass Island Ferries and every message below are made up by "
    "service/demo_data.py"
)

PORTS = ("Marrow Quay", "Tobel Harbour", "Innisvar", "Kelp Point", "Gannet Sound", "Orrin Bay")
VESSELS = ("MV Gullwing", "MV Saltmarsh", "MV Brennan Star", "MV Tidewright")
NAMES = (
    "Aileen", "Brodie", "Catriona", "Dougal", "Elspeth", "Fergus", "Greer", "Hamish", "Isla",
    "Jonah", "Kirsty", "Lachlan", "Morven", "Niall", "Oona", "Pádraig", "Rhona", "Sorcha",
    "Tormod", "Una",
)  # fmt: skip
TIMES = ("06:40", "08:15", "09:30", "11:05", "12:50", "14:20", "16:45", "18:10", "19:35")
WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")

# Words every theme uses; they blur the boundaries between themes on purpose.
SHARED_WORDS = (
    "ferry", "crossing", "sailing", "ticket", "today", "tomorrow", "please", "thanks", "help",
    "island", "harbour", "port", "boat", "trip", "journey", "morning", "evening", "family",
    "booking", "time", "need", "week", "saturday", "sunday",
)  # fmt: skip
FILLER_SENTENCES = (
    "Thanks in advance.",
    "Many thanks for your help.",
    "Hope you can help.",
    "Sorry to bother you.",
    "Kind regards, {name}.",
    "Cheers, {name}",
    "Please get back to me when you can.",
    "Looking forward to hearing from you.",
    "We travel to the island every summer.",
    "My booking reference is {ref}.",
    "I am a resident on {port}.",
    "Hello, this is {name}.",
)


@dataclass(frozen=True)
class Theme:
    """One invented theme of passenger mail.

    Parameters
    ----------
    name
        Short identifier (``"delays"``); the ground truth carried by each message.
    title
        Human title, for printed tables.
    words
        The theme's own vocabulary, drawn into messages as extra words.
    templates
        Sentence templates with slots ``{port}``, ``{vessel}``, ``{time}``, ``{day}``,
        ``{name}``, ``{ref}``, ``{n}``, ``{w}`` (a random theme word).
    """

    name: str
    title: str
    words: tuple[str, ...]
    templates: tuple[str, ...]


THEMES: tuple[Theme, ...] = (
    Theme(
        "bookings",
        "Bookings and refunds",
        (
            "refund",
            "cancel",
            "payment",
            "charged",
            "card",
            "reference",
            "amend",
            "change",
            "fare",
            "return",
            "single",
            "receipt",
            "invoice",
            "twice",
            "money",
            "credit",
            "voucher",
            "online",
            "website",
            "confirmation",
            "email",
            "price",
            "discount",
            "account",
            "transfer",
        ),
        (
            "I was charged twice for booking {ref} and would like a refund.",
            "Can I change my return from {day} to the following week without paying again?",
            "The website took my card payment but I never got a confirmation email.",
            "I need to cancel my booking {ref} for {n} passengers and get my money back.",
            "How long does a refund take to reach my card after a cancellation?",
            "Could you send a receipt or invoice for the fare I paid online?",
            "Is there a discount on return fares for island residents?",
            "I would like to amend the names on booking {ref}; the price should not change.",
            "Your payment page failed twice and now my account shows two pending charges.",
            "Can my unused voucher be used as credit against a new booking?",
        ),
    ),
    Theme(
        "delays",
        "Delays and cancellations",
        (
            "delayed",
            "cancelled",
            "weather",
            "wind",
            "storm",
            "gale",
            "swell",
            "waves",
            "waiting",
            "hours",
            "stranded",
            "update",
            "warning",
            "disruption",
            "rough",
            "sea",
            "conditions",
            "missed",
            "connection",
            "train",
            "bus",
            "hotel",
            "overnight",
            "forecast",
            "suspended",
        ),
        (
            "Is the {time} sailing from {port} cancelled because of the weather?",
            "We have been waiting at {port} for {n} hours and nobody has given an update.",
            "The {vessel} was delayed and we missed the last bus connection.",
            "Are sailings suspended tomorrow with the gale warning in the forecast?",
            "Our crossing was cancelled, do we get a hotel for the night?",
            "The sea is very rough, will the {time} crossing still go?",
            "We are stranded on {port} after the storm cancelled every sailing.",
            "Please post disruption updates sooner, we missed our train because of the delay.",
            "How strong does the wind need to be before a sailing is cancelled?",
            "Will the delayed {vessel} still wait for the connecting train?",
        ),
    ),
    Theme(
        "lost_property",
        "Lost property",
        (
            "lost",
            "left",
            "found",
            "bag",
            "jacket",
            "phone",
            "wallet",
            "keys",
            "glasses",
            "backpack",
            "umbrella",
            "seat",
            "lounge",
            "deck",
            "toy",
            "passport",
            "purse",
            "collect",
            "handed",
            "blue",
            "black",
            "red",
            "missing",
            "charger",
            "camera",
        ),
        (
            "I left my {w} on the {vessel} on the {time} crossing, has anyone handed it in?",
            "My daughter lost her toy rabbit on the upper deck, it is very precious to her.",
            "Has a black wallet been found in the lounge after the {day} sailing?",
            "I think I left my phone charger and glasses under a seat near the cafe.",
            "Where can I collect a bag that was handed in at {port}?",
            "A blue backpack with a camera inside went missing on the {vessel}.",
            "I lost my passport somewhere between the car deck and the lounge.",
            "Did anyone find a red umbrella and a set of keys on {day}?",
            "My jacket was left on the outside deck, the purse is in the pocket.",
            "How long do you keep lost property before it is given away?",
        ),
    ),
    Theme(
        "vehicles",
        "Vehicles and freight",
        (
            "car",
            "van",
            "vehicle",
            "trailer",
            "caravan",
            "motorhome",
            "lorry",
            "freight",
            "length",
            "height",
            "metres",
            "deck",
            "lane",
            "loading",
            "driver",
            "pallet",
            "delivery",
            "goods",
            "livestock",
            "haulage",
            "tractor",
            "campervan",
            "bike",
            "motorbike",
            "registration",
        ),
        (
            "Can I bring a car with a roof box, the height is about {n} metres?",
            "What is the price for a van and trailer over seven metres long?",
            "We are shipping {n} pallets of building goods to {port}, how do I book freight?",
            "Does a motorhome need a special lane for loading at {port}?",
            "Our haulage lorry missed the {time} loading time, is there space on the next one?",
            "Can the driver stay with the livestock trailer during the crossing?",
            "I need to change the registration of the vehicle on my booking.",
            "Is there space for a campervan and two bikes on {day}?",
            "Do motorbikes have to be strapped down on the car deck?",
            "When is the latest delivery of freight accepted for the {vessel}?",
        ),
    ),
    Theme(
        "access",
        "Access and assistance",
        (
            "wheelchair",
            "assistance",
            "mobility",
            "disabled",
            "lift",
            "ramp",
            "access",
            "accessible",
            "carer",
            "scooter",
            "blind",
            "deaf",
            "hearing",
            "guide",
            "support",
            "steps",
            "walking",
            "frame",
            "elderly",
            "toilet",
            "priority",
            "boarding",
            "seating",
            "oxygen",
            "medical",
        ),
        (
            "My father uses a wheelchair, is there a lift from the car deck to the lounge?",
            "Can we book assistance for an elderly passenger boarding at {port}?",
            "Is the ramp at {port} steep, my mother has a walking frame?",
            "Does the {vessel} have an accessible toilet on the passenger deck?",
            "I am partially blind and travel with a guide dog, can I get priority boarding?",
            "Can a carer travel free with a disabled passenger?",
            "Is there a hearing loop in the lounge for deaf passengers?",
            "I use a mobility scooter, will it fit in the lift?",
            "Can I bring an oxygen supply on board for a medical condition?",
            "We need seating near the exit because my son cannot manage the steps.",
        ),
    ),
    Theme(
        "timetables",
        "Timetables",
        (
            "timetable",
            "schedule",
            "summer",
            "winter",
            "departure",
            "arrival",
            "first",
            "last",
            "earliest",
            "latest",
            "weekday",
            "weekend",
            "season",
            "route",
            "direct",
            "frequency",
            "daily",
            "extra",
            "holiday",
            "bank",
            "times",
            "printed",
            "published",
            "calendar",
            "change",
        ),
        (
            "When is the summer timetable published for the {port} route?",
            "What time is the first departure from {port} on a {day}?",
            "Is there a direct sailing to {port} or do I change at Innisvar?",
            "Does the winter schedule still have a late evening departure?",
            "Are there extra sailings on the bank holiday weekend?",
            "What is the earliest arrival at {port} if I leave on the {time}?",
            "How often do boats run daily between {port} and Marrow Quay?",
            "Can you send me a printed timetable for the new season?",
            "Has the {time} departure been moved in the new calendar?",
            "Is the weekend timetable different from the weekday one?",
        ),
    ),
    Theme(
        "pets",
        "Pets and animals",
        (
            "dog",
            "dogs",
            "cat",
            "pet",
            "pets",
            "lead",
            "muzzle",
            "kennel",
            "crate",
            "puppy",
            "animal",
            "animals",
            "vet",
            "horse",
            "allowed",
            "cabin",
            "outside",
            "water",
            "bowl",
            "basket",
            "leash",
            "breed",
            "small",
            "large",
            "calm",
        ),
        (
            "Are dogs allowed in the passenger lounge or only on the outside deck?",
            "Does my puppy need a muzzle on a lead during the crossing?",
            "Can I bring a cat in a crate on the {time} sailing?",
            "Is there a kennel area on the {vessel} for large dogs?",
            "Do pets need a ticket, and is there water for them on board?",
            "We travel with two small dogs in a basket, can they stay with us?",
            "Can a horse travel in a trailer on the car deck?",
            "My dog gets anxious, is there a calm place for animals?",
            "Are there rules about breeds of dog on board?",
            "Where do pets wait at {port} before boarding?",
        ),
    ),
    Theme(
        "onboard",
        "Onboard services",
        (
            "cafe",
            "food",
            "coffee",
            "menu",
            "breakfast",
            "lunch",
            "vegan",
            "gluten",
            "allergy",
            "shop",
            "wifi",
            "charging",
            "sockets",
            "cabin",
            "seats",
            "reserved",
            "quiet",
            "children",
            "play",
            "area",
            "newspaper",
            "tea",
            "sandwich",
            "snacks",
            "open",
        ),
        (
            "Is the cafe open on the {time} sailing, and is there a vegan option?",
            "Does the {vessel} have wifi and charging sockets at the seats?",
            "My son has a nut allergy, can the cafe tell us what is in the food?",
            "Is there a quiet lounge or reserved seats on the longer crossing?",
            "Do you sell gluten free sandwiches and snacks on board?",
            "Is there a play area for children on the {vessel}?",
            "What time does the shop open on the morning sailing?",
            "Can I buy breakfast on the {time} departure from {port}?",
            "The coffee machine was broken again, will it be fixed?",
            "Do you have newspapers and tea in the lounge?",
        ),
    ),
)

CROSS_THEME_RATE = 0.15

THEME_NAMES: tuple[str, ...] = tuple(theme.name for theme in THEMES)

JUNK_WORDS = (
    "winner", "prize", "claim", "crypto", "bitcoin", "casino", "bonus", "free", "offer",
    "click", "link", "unsubscribe", "investment", "guaranteed", "profit", "loan", "pills",
    "viagra", "lottery", "jackpot", "urgent", "verify", "account", "password", "deal",
    "limited", "exclusive", "reward", "gift", "cash",
)  # fmt: skip
JUNK_TEMPLATES = (
    "CONGRATULATIONS winner! Claim your crypto prize now, click the link http://win-{ref}.example",
    "Exclusive casino bonus: free spins and guaranteed jackpot, limited offer, click here",
    "Urgent: verify your account password at http://secure-{ref}.example to claim your reward",
    "Guaranteed investment profit {n}00% in bitcoin, reply now for the exclusive deal",
    "Cheap loan approved, cash in your account today, unsubscribe at http://x{ref}.example",
    "You won the lottery gift card! Claim cash reward now, limited offer, click link",
)


@dataclass(frozen=True)
class DemoMessage:
    """One invented message.

    ``theme`` is the ground truth (a theme name or ``"junk"``); the model never sees it.
    """

    id: str
    day: int
    theme: str
    text: str

    def to_json(self) -> dict[str, str | int]:
        """The message as the JSON-lines record the command line reads."""
        return {"id": self.id, "text": self.text, "day": self.day, "theme": self.theme}


@dataclass(frozen=True)
class DayPlan:
    """The shape of one simulated day.

    Parameters
    ----------
    day
        Day number, from 1.
    title
        What happens that day, for printed headers.
    messages
        Number of ordinary (themed) messages.
    theme_weights
        Relative share of each theme that day (missing themes get 0).
    junk
        Number of junk messages, sent as one burst in the middle of the day.
    """

    day: int
    title: str
    messages: int
    theme_weights: dict[str, float] = field(default_factory=dict)
    junk: int = 0


BASE_MIX: dict[str, float] = {
    "bookings": 0.20,
    "delays": 0.10,
    "lost_property": 0.10,
    "vehicles": 0.15,
    "access": 0.10,
    "timetables": 0.15,
    "pets": 0.10,
    "onboard": 0.10,
}


def _shifted(mix: dict[str, float], **changes: float) -> dict[str, float]:
    out = dict(mix)
    out.update(changes)
    return out


def default_days(scale: float = 1.0) -> list[DayPlan]:
    """The demo's week: quiet days, a drifting mix, a storm day and a junk burst.

    Parameters
    ----------
    scale
        Multiplies every day's message count (tests use a small scale).

    Returns
    -------
    list of DayPlan
        Day 4 is the storm (delays swell to about half of the mail); day 5 carries the junk
        burst.
    """

    def n(count: int) -> int:
        return max(1, round(count * scale))

    return [
        DayPlan(1, "an ordinary spring day", n(600), BASE_MIX),
        DayPlan(2, "an ordinary day", n(600), _shifted(BASE_MIX, timetables=0.2)),
        DayPlan(3, "summer timetable announced", n(600), _shifted(BASE_MIX, timetables=0.3)),
        DayPlan(4, "STORM: gales cancel most sailings", n(600), _shifted(BASE_MIX, delays=1.5)),
        DayPlan(5, "calm again, junk burst arrives", n(400), BASE_MIX, junk=n(400)),
        DayPlan(6, "festival weekend", n(600), _shifted(BASE_MIX, vehicles=0.3, pets=0.15)),
    ]


def _fill(template: str, theme_words: Sequence[str], rng: random.Random) -> str:
    return template.format(
        port=rng.choice(PORTS),
        vessel=rng.choice(VESSELS),
        time=rng.choice(TIMES),
        day=rng.choice(WEEKDAYS),
        name=rng.choice(NAMES),
        ref=f"SG{rng.randrange(10_000, 99_999)}",
        n=rng.randrange(2, 6),
        w=rng.choice(theme_words) if theme_words else "",
    )


def compose_message(theme: Theme, rng: random.Random) -> str:
    """Write one invented message of ``theme``.

    A message is one or two of the theme's templates, a few extra theme words woven into a
    short sentence, shared words and a filler sentence; about one message in seven also carries a
    sentence or words of another theme, so that themes overlap.
    """
    parts: list[str] = []
    if rng.random() < 0.5:
        parts.append(_fill(rng.choice(FILLER_SENTENCES), theme.words, rng))
    for template in rng.sample(theme.templates, k=rng.choice((1, 1, 2))):
        parts.append(_fill(template, theme.words, rng))
    if rng.random() < CROSS_THEME_RATE:
        # real mail wanders: a sentence or a few words from another theme
        other = rng.choice([t for t in THEMES if t.name != theme.name])
        if rng.random() < 0.5:
            parts.append(_fill(rng.choice(other.templates), other.words, rng))
        else:
            parts.append(" ".join(rng.sample(other.words, k=2)) + "?")
    extra = rng.sample(theme.words, k=rng.randrange(1, 4))
    shared = rng.sample(SHARED_WORDS, k=rng.randrange(1, 4))
    mixed = extra + shared
    rng.shuffle(mixed)
    parts.append("Also: " + " ".join(mixed) + ".")
    if rng.random() < 0.6:
        parts.append(_fill(rng.choice(FILLER_SENTENCES), theme.words, rng))
    return " ".join(parts)


def compose_junk(rng: random.Random) -> str:
    """Write one invented junk (spam-like) message."""
    text = _fill(rng.choice(JUNK_TEMPLATES), JUNK_WORDS, rng)
    return text + " " + " ".join(rng.sample(JUNK_WORDS, k=rng.randrange(3, 7)))


def generate_day(plan: DayPlan, seed: int = 0) -> list[DemoMessage]:
    """The messages of one simulated day, in arrival order.

    Junk messages arrive as one contiguous burst in the middle of the day, so that a rollback
    can skip them as one stream range.

    Parameters
    ----------
    plan
        The day's shape.
    seed
        Seed of the generator; the day number is mixed in, so days differ.

    Returns
    -------
    list of DemoMessage
        Ids look like ``d4-0017`` (day, position in the day).
    """
    rng = random.Random(seed * 1_000_003 + plan.day)
    names = [name for name in THEME_NAMES if plan.theme_weights.get(name, 0.0) > 0]
    weights = [plan.theme_weights[name] for name in names]
    by_name = {theme.name: theme for theme in THEMES}
    themes = rng.choices(names, weights=weights, k=plan.messages) if names else []
    texts: list[tuple[str, str]] = [(name, compose_message(by_name[name], rng)) for name in themes]
    if plan.junk:
        burst = [("junk", compose_junk(rng)) for _ in range(plan.junk)]
        middle = len(texts) // 2
        texts = texts[:middle] + burst + texts[middle:]
    return [
        DemoMessage(id=f"d{plan.day}-{i:04d}", day=plan.day, theme=theme, text=text)
        for i, (theme, text) in enumerate(texts)
    ]


def generate_days(plans: Sequence[DayPlan] | None = None, seed: int = 0) -> list[list[DemoMessage]]:
    """Every day of ``plans`` (default: :func:`default_days`), one list per day."""
    return [generate_day(plan, seed) for plan in (plans or default_days())]


def fresh_examples(seed: int = 12345) -> list[DemoMessage]:
    """One new message per theme plus one junk message, for showing routing answers."""
    rng = random.Random(seed)
    out = [
        DemoMessage(
            id=f"fresh-{theme.name}", day=0, theme=theme.name, text=compose_message(theme, rng)
        )
        for theme in THEMES
    ]
    out.append(DemoMessage(id="fresh-junk", day=0, theme="junk", text=compose_junk(rng)))
    return out


# The invented inbox's simulated first day (2025-06-02, a Monday), for mail Date headers.
MAIL_EPOCH = 1_748_822_400.0
INVENTED_SENDER_DOMAIN = "passengers.saltgrass-ferries.invalid"  # RFC 2606: .invalid


def mail_drafts(days: Sequence[Sequence[DemoMessage]]) -> list[Any]:
    """The invented messages as mail drafts (:class:`intake.compose.MailDraft`): one day of
    simulated time per day, the messages spread over it, each marked as invented."""
    from intake.compose import MailDraft

    drafts = []
    for messages in days:
        for i, message in enumerate(messages):
            moment = MAIL_EPOCH + (message.day - 1) * 86400 + 21600 + i * 43200 / len(messages)
            drafts.append(
                MailDraft(
                    id=f"{message.id}@{INVENTED_SENDER_DOMAIN}",
                    text=message.text,
                    received=moment,
                    sender=f"passenger-{message.id}@{INVENTED_SENDER_DOMAIN}",
                    to="inbox@saltgrass-ferries.invalid",
                    extra_headers=(("X-Invented-Data", INVENTED_NOTICE),),
                )
            )
    return drafts


def write_demo_mail(folder: str | Path, scale: float = 1.0, seed: int = 0) -> tuple[Path, Path]:
    """Write the invented ferry inbox as ``inbox.mbox`` and the Maildir ``Maildir/`` in
    ``folder`` (both INVENTED data); returns their paths."""
    from intake.compose import write_maildir, write_mbox

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    drafts = mail_drafts(generate_days(default_days(scale), seed))
    mbox, maildir = folder / "inbox.mbox", folder / "Maildir"
    write_mbox(mbox, drafts)
    if maildir.exists():
        import shutil

        shutil.rmtree(maildir)
    write_maildir(maildir, drafts)
    return mbox, maildir
