"""Write the two invented demo tasks under sample_tasks/ (standard library only, seeded, reproducible).

ferry_messages: passenger messages to Merrowlight Ferries, an invented island ferry line, five labels.
reply_check:    a customer question and an agent's reply at Hollowmere Broadband, an invented home-internet
                provider, labelled resolves / does_not_resolve.

Every text comes from templates x slot fillers, with seeded typos, mixed registers and a little label
noise, so neither task can be solved by one keyword. Run: python scripts/make_sample_tasks.py
"""

from __future__ import annotations

import csv
import random
import re
from pathlib import Path

SEED = 2026
OUT = Path(__file__).resolve().parent.parent / "sample_tasks"
SPLITS = ("train", "dev", "test")
SPLIT_SHARE = (4, 1, 1)  # train:dev:test, applied per label so every split keeps the class balance

# ---------------------------------------------------------------- shared helpers


def pick(rng: random.Random, items: list[str]) -> str:
    """One item, uniformly."""
    return items[rng.randrange(len(items))]


def add_typos(text: str, rng: random.Random) -> str:
    """Swap, drop or double one letter in one or two longer words, the way fast typists do."""
    words = text.split(" ")
    candidates = [i for i, w in enumerate(words) if len(w) >= 4 and w.isalpha()]
    for i in rng.sample(candidates, min(len(candidates), rng.choice((1, 1, 2)))):
        w = words[i]
        j = rng.randrange(1, len(w) - 1)
        op = rng.choice(("swap", "drop", "double"))
        if op == "swap":
            w = w[:j] + w[j + 1] + w[j] + w[j + 2 :]
        elif op == "drop":
            w = w[:j] + w[j + 1 :]
        else:
            w = w[:j] + w[j] + w[j:]
        words[i] = w
    return " ".join(words)


def dedupe_key(text: str) -> str:
    """Case, spacing and punctuation do not make two texts different."""
    return re.sub(r"[^a-z0-9]+", " ", text.lower()).strip()


def one_line(text: str) -> str:
    """Collapse spaces; a newline would break the one-row-per-text promise."""
    text = re.sub(r"\s+", " ", text).strip()
    if "\n" in text or "\r" in text:
        raise ValueError(f"text spans lines: {text!r}")
    return text


def split_by_label(rows: list[dict], rng: random.Random) -> dict[str, list[dict]]:
    """Stratified 4:1:1 split; rows are already unique, so no text can land in two splits."""
    out: dict[str, list[dict]] = {s: [] for s in SPLITS}
    labels = sorted({r["label"] for r in rows})
    for label in labels:
        group = [r for r in rows if r["label"] == label]
        rng.shuffle(group)
        n_dev = len(group) * SPLIT_SHARE[1] // sum(SPLIT_SHARE)
        n_test = len(group) * SPLIT_SHARE[2] // sum(SPLIT_SHARE)
        n_train = len(group) - n_dev - n_test
        out["train"] += group[:n_train]
        out["dev"] += group[n_train : n_train + n_dev]
        out["test"] += group[n_train + n_dev :]
    for split in SPLITS:
        rng.shuffle(out[split])
    return out


def flip_labels(rows: list[dict], labels: list[str], rate: float, rng: random.Random) -> int:
    """Give a `rate` share of rows a wrong label, as careless annotators do; returns how many."""
    chosen = rng.sample(range(len(rows)), round(rate * len(rows)))
    for i in chosen:
        rows[i]["label"] = pick(rng, [lab for lab in labels if lab != rows[i]["label"]])
    return len(chosen)


def write_csv(path: Path, columns: list[str], rows: list[dict]) -> None:
    """Write with the csv module, LF line ends, so re-runs are byte-identical on every OS."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="", encoding="utf-8") as f:
        writer = csv.DictWriter(f, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)


def best_keyword_f1(texts: list[str], labels: list[str], target: str) -> tuple[str, float]:
    """Best one-vs-rest rule 'predict target if this lowercase word occurs'; F1 of that rule."""
    docs = [set(re.findall(r"[a-z']+", t.lower())) for t in texts]
    positives = sum(lab == target for lab in labels)
    best = ("", 0.0)
    for word in sorted(set().union(*docs)):
        hits = [lab for d, lab in zip(docs, labels, strict=True) if word in d]
        tp = sum(lab == target for lab in hits)
        f1 = 2 * tp / (len(hits) + positives) if tp else 0.0
        if f1 > best[1]:
            best = (word, f1)
    return best


def count_table(splits: dict[str, list[dict]], labels: list[str]) -> str:
    """Markdown table of label counts per split."""
    head = "| label | " + " | ".join(SPLITS) + " |\n|---|" + "---:|" * len(SPLITS) + "\n"
    body = ""
    for label in labels + ["total"]:
        cells = [
            str(len(splits[s]) if label == "total" else sum(r["label"] == label for r in splits[s]))
            for s in SPLITS
        ]
        body += f"| {label} | " + " | ".join(cells) + " |\n"
    return head + body


# ---------------------------------------------------------------- ferry_messages: Merrowlight Ferries
# Invented scenario: one mainland port (Port Aldwick) and five small islands in the Caddon Isles.

FERRY_LABELS = ["schedule", "refund", "accessibility", "lost_item", "praise"]
# Imbalanced on purpose: timetable questions dominate a real inbox, thank-you notes are rare.
FERRY_COUNTS = {"schedule": 270, "refund": 216, "accessibility": 162, "lost_item": 150, "praise": 102}
FERRY_NOISE = 0.04

ISLANDS = ["Inchcaddon", "Rona Beg", "Tullagh", "Skarra", "Little Fenna"]
PORTS = ["Port Aldwick", "Inchcaddon Quay", "Rona Beg slip", "Tullagh Harbour", "Skarra Pier", "Fenna jetty"]
BOATS = [
    "the Sorrel Gannet",
    "the Kittiwake Dawn",
    "the Hebe Mara",
    "the little Tern",
    "the Caddon Star",
    "the Gannet",
    "the Kittiwake",
]
DAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]
TIMES = ["07:40", "8.15", "09:30", "10:05", "11:50", "12:30", "14:10", "4.20", "17:45", "19:00", "21:15"]
WHEN = [
    "yesterday",
    "last Friday",
    "on 3 June",
    "on the 22nd",
    "this morning",
    "on Easter Monday",
    "last weekend",
    "on Tuesday evening",
    "two days ago",
    "on 14 August",
]
FUTURE = [
    "tomorrow",
    "this Saturday",
    "on 14 July",
    "next weekend",
    "on the bank holiday Monday",
    "over Easter",
    "on the 30th",
    "next Thursday",
]
SEASONS = ["the winter", "the summer", "the October half-term", "Christmas and New Year", "the spring"]
PEOPLE = [
    "my mum",
    "my husband",
    "my wife",
    "my son",
    "my daughter",
    "my elderly father",
    "a friend",
    "my partner",
    "my grandson",
    "my aunt",
]
AIDS = [
    "wheelchair",
    "powered wheelchair",
    "mobility scooter",
    "walking frame",
    "rollator",
    "folding wheelchair",
]
ITEMS = [
    "black rucksack",
    "phone",
    "blue raincoat",
    "pair of reading glasses",
    "set of car keys",
    "purse",
    "grey wool scarf",
    "teddy bear",
    "walking stick",
    "hearing aid",
    "wallet",
    "camera",
    "laptop bag",
    "pair of sunglasses",
    "dog lead",
    "green umbrella",
    "tablet in a red case",
    "bag of shopping",
    "ticket wallet",
    "child's car seat",
    "denim jacket",
    "water bottle",
]
CREW = [
    "the deckhand",
    "the purser",
    "the lady in the ticket office",
    "the crew",
    "Captain Orla",
    "the young lad in the cafe",
    "the car deck staff",
    "the harbour staff",
    "the skipper",
]
AMOUNTS = ["£38", "£12.50", "£104", "£27.80", "£66", "£9", "£150", "£44.20"]
COLOURS = ["red", "yellow", "orange", "white", "bright green", "purple"]
NAMES = [
    "Aileen",
    "R. Douglas",
    "Tom",
    "Mrs Petrie",
    "Calum",
    "Jo",
    "Mairi Fletcher",
    "Sanjay",
    "Ewan",
    "Priya",
    "Ben",
    "Fiona",
]

# Per label: formal and informal core sentences, short one-liners, follow-up details, and an aside used
# when the label is the *second* topic of a message about something else.
FERRY_TEMPLATES: dict[str, dict[str, list[str]]] = {
    "schedule": {
        "formal": [
            "Could you tell me the departure times from {port} to {port2} {future}?",
            "I would like to know whether the {time} sailing from {port} operates during {season}.",
            "Is there a later boat back from {port2} than the {time} on {day}s?",
            "Please could you confirm what time the first crossing leaves {port} on {day}?",
            "We are planning a day trip to {island} {future}. What time is the last return sailing?",
            "Has the timetable for {season} been published yet? I cannot find it on your website.",
            "Will {boat} be running between {port} and {port2} {future}, or is she still in for repairs?",
            "I have a ticket for the {time} from {port}. With the forecast as it is, is the sailing likely "
            "to go ahead?",
            "How long does the crossing to {island} take, and how early should we be at {port} to check in?",
            "Does the {time} from {port} call at {port2} on the way, or does it go direct?",
            "Could you advise whether there is a connecting sailing on to {island} after the {time} arrives?",
            "What time does the ticket office at {port} open on {day}s?",
            "Is the {time} on {day}s a summer-only sailing, or does it run all year?",
            "I understand the timetable changed recently. Does the morning boat from {port} still leave "
            "at {time}?",
            "Could you let me know if sailings to {island} are disrupted {future}? I have heard there is "
            "work on the pier at {port2}.",
            "Is it possible to travel out to {island} and back on the same day on a {day}, and if so, which "
            "sailings would you suggest?",
            "Will there be extra sailings during {season}? The boats were very full last year.",
            "I was told the {time} sometimes leaves a little late at low tide. How much later should I "
            "expect it?",
        ],
        "informal": [
            "what time's the last boat back from {port2} on a {day}?",
            "is the {time} running today? wind looks grim",
            "boat late again?? been sat at {port} since {time} and nothing on the board",
            "any sailings to {island} {future} or is that summer only",
            "when does {boat} leave {port} tomorrow morning",
            "do you do a late boat at weekends? want to stay on {island} for the dance",
            "how early do i need to be at {port} for the {time}, got a car",
            "is the timetable on the website right? says {time} but my mate says it's changed",
            "are you sailing {future} with the storm coming in",
            "first boat to {island} on {day}, what time?",
            "heard the {time} was cancelled, is the next one still on",
            "how long is the crossing {port} to {port2} roughly",
            "will the {time} wait if the bus from the station is late? happens every week",
            "whats the deal with sailings over {season}, cant find anything",
        ],
        "short": [
            "{day} times to {island}?",
            "last boat from {port2}?",
            "is the {time} on",
            "ferry times {future}",
            "timetable for {season} pls",
            "next sailing to {island}?",
            "is the {time} late today",
            "when's the first boat {future}",
        ],
        "detail": [
            "We will have a car with us.",
            "We need to be back on the mainland for work on Monday.",
            "There are four of us travelling.",
            "I'd rather not book until I know the times.",
            "I need to catch a train at the other end.",
            "it's for a wedding so we cant be late",
        ],
        "aside": [
            "Also, is the {time} still running on {day}s?",
            "By the way, when does the winter timetable start?",
            "(also what time is the last boat back on a {day}?)",
        ],
    },
    "refund": {
        "formal": [
            "My {time} sailing {when} was cancelled and I would like my money back.",
            "I was charged twice for the same ticket ({amount}). Please return the duplicate payment.",
            "I booked a return to {island} but was unable to travel owing to illness. Am I entitled to a refund?",
            "{boat_cap} broke down and we waited over three hours at {port}. I am requesting compensation for "
            "the delay.",
            "I paid {amount} for a car space but we were put on as foot passengers. Please reimburse the "
            "difference.",
            "Could you explain why the refund for booking {ref} has not reached my account after three weeks?",
            "I bought an annual pass and have since moved off {island}. How do I claim back the unused months?",
            "The sailing {when} was so late that I missed my train and had to pay {amount} for a hotel. I would "
            "like this covered.",
            "I wish to cancel my booking for {future} and have the fare returned to my card.",
            "Your website took payment of {amount} but no ticket was ever issued. Please return the money.",
            "I was overcharged on booking {ref}: the fare shown was lower than the {amount} taken.",
            "We were turned away at {port} because the boat was full, despite holding tickets. We expect the "
            "fare to be repaid in full.",
            "Please advise how I can obtain a credit note for the crossing I could not take {when}.",
            "The cabin we paid for on the overnight sailing was not available. I would like the cabin "
            "supplement of {amount} returned.",
            "I paid {amount} for an extra bag allowance that was never added to booking {ref}. Please refund it.",
        ],
        "informal": [
            "want my money back, boat cancelled AGAIN",
            "you charged me {amount} twice for one ticket?? sort it please",
            "how do i get a refund if i cant make the {time}",
            "cancelled our trip to {island}, can we get the cash back or just credit",
            "still waiting on the {amount} you owe me from when {boat} didnt sail",
            "paid for a cabin, never got one. want that back",
            "booked the wrong day by mistake, can i get my money back? ref {ref}",
            "the {time} never turned up {when}. who do i claim from",
            "card got hit for {amount} but no ticket in my email??",
            "missed my train cos the boat was 2 hours late, are you paying for my taxi",
            "you owe me {amount}, simple as",
            "how long do refunds take, been a month",
        ],
        "short": [
            "refund for {ref} please",
            "money back for cancelled {time}?",
            "charged twice, {amount}",
            "still no refund",
            "claim for the delay {when}",
            "want my {amount} back",
        ],
        "detail": [
            "The booking reference is {ref}.",
            "I have the confirmation email and the bank statement.",
            "I paid by card.",
            "This is the second time this has happened.",
            "I'd accept a voucher if a full refund isn't possible.",
            "got the email saying it was cancelled but nothing since",
        ],
        "aside": [
            "I may want my money back for the return leg too, but that can wait.",
            "I'll deal with the refund for the cancelled leg separately.",
            "ps still waiting on a refund from last month",
        ],
    },
    "accessibility": {
        "formal": [
            "{person_cap} uses a {aid}. Is there step-free access onto {boat}?",
            "Could you arrange assistance boarding at {port} {future}? I have limited mobility.",
            "Is the passenger lounge on {boat} reachable without using stairs?",
            "Are assistance dogs permitted in the lounge on the crossing to {island}?",
            "I am hard of hearing. Are announcements on board also shown on screens?",
            "Is there an accessible toilet on the smaller boat that serves {port2}?",
            "May I remain in my car on the car deck during the crossing? I find the stairs very difficult.",
            "The ramp at {port2} was too steep for my {aid} {when}. Is there another way on board?",
            "I am registered blind and travelling alone. Could a member of staff meet me at the ticket desk "
            "at {port}?",
            "Can I bring a {aid} on board, and does it need a ticket of its own?",
            "My son is autistic and finds crowds overwhelming. Is there a quieter area on {boat}?",
            "Is the lift on {boat} working again? It was out of order {when} and we had to be carried up.",
            "Do you offer priority boarding for passengers who cannot stand in a queue for long?",
            "Could you tell me whether the gangway at {port} is suitable for a {aid} at low tide?",
            "I will be travelling with an oxygen concentrator. Is there a power socket I could use during "
            "the crossing?",
        ],
        "informal": [
            "can i get a {aid} on the {time}?",
            "is there a lift on {boat} or just stairs",
            "my nan cant do steps, any help getting her on the boat at {port}?",
            "does {port2} have a ramp? pushing {person} in a {aid}",
            "need someone to help me with my bag and my crutches at {port}, is that possible",
            "is there anywhere to sit while queuing at {port}? cant stand long",
            "can my guide dog come in the cafe bit or does she have to stay on deck",
            "is the disabled loo on {boat} fixed yet",
            "{person} is deaf, how will they know when we're docking",
            "the lift was broken {when} and the crew had to carry my {aid} up, will it be fixed",
            "can we stay in the van on the crossing, my dad really cant manage the stairs",
            "do you need to book assistance or can i just turn up",
            "the assistance we booked turned up late and we nearly missed the boat, can someone be there on time",
        ],
        "short": [
            "wheelchair access on {boat}?",
            "lift working on {boat}?",
            "help boarding at {port} {future}",
            "ramp at {port2}?",
            "step free access to {island}?",
            "assistance dogs allowed?",
        ],
        "detail": [
            "I can manage a few steps with a rail but not a full staircase.",
            "We would rather know in advance than get stuck on the pier.",
            "The {aid} folds but is heavy.",
            "I have a blue badge if that helps.",
            "last time it took ages to get sorted",
            "A carer will be travelling with me.",
        ],
        "aside": [
            "(I use a walking stick, if that matters.)",
            "We'll need the ramp again, as {person} uses a {aid}.",
            "also is the lift on {boat} working now",
        ],
    },
    "lost_item": {
        "formal": [
            "I left my {item} on {boat} {when}, on the {time} from {port}.",
            "I believe I left a {item} in the lounge during the crossing to {island}. Has anything been "
            "handed in?",
            "{person_cap} mislaid a {item} on the car deck {when}. Could you please check lost property?",
            "Could you check whether a {item} was found at the {port} ticket office {when}?",
            "I travelled {when} and cannot find my {item}; I think it slipped out of my bag on board.",
            "How do I collect an item from your lost property office at {port}? The crew found my {item}.",
            "I was running late and rushed off the {time} without my {item}. Is there any way to check if it "
            "is still on board?",
            "We appear to have forgotten a {item} under the seats near the cafe on {boat}.",
            "My {item} went missing between the car deck and the upper lounge {when}.",
            "If a {item} is handed in, could you please keep it for me? I will be back on {island} {future}.",
            "Please could your crew look for a {item}? I think I put it down by the window on the {time}.",
        ],
        "informal": [
            "left my {item} on the boat, anyone find it??",
            "think i dropped my {item} on the {time} from {port}",
            "lost my {item} somewhere between the car deck and the cafe",
            "my kid left his {item} under a seat on {boat} {when}, pls help",
            "anyone hand in a {item}? had my ticket in the pocket",
            "cant find my {item} anywhere since getting off at {port2}",
            "forgot my {item} on the {time}, gutted",
            "is there a lost property? {item} missing since {when}",
            "pretty sure my {item} is still on {boat}, by the tables",
            "did the cleaners find a {item} after the {time}",
            "left a {item} in the loo on the way to {island} :(",
        ],
        "short": [
            "lost {item} on {boat}",
            "{item} left on the {time}",
            "lost property at {port}?",
            "anyone found a {item}?",
            "left my {item} on the ferry",
        ],
        "detail": [
            "It has my name written inside.",
            "It's got a {colour} tag on it.",
            "I can describe it in more detail if needed.",
            "It's of great sentimental value.",
            "I'll pay the postage if you can send it on.",
            "my phone number is on the case",
        ],
        "aside": [
            "Separately, I think I left a scarf on board, but no matter.",
            "Also, did anyone hand in a {item}?",
            "ps left my {item} last time, never did get it back lol",
        ],
    },
    "praise": {
        "formal": [
            "I wish to commend {crew} on {boat} for their kindness {when}.",
            "The crossing to {island} was wonderful, and {crew} went out of their way to help {person}.",
            "Please pass on our gratitude to the staff at {port}; although the boat was running late, they "
            "kept everyone informed.",
            "I would like to say how impressed I was with {boat}. Spotless and very comfortable.",
            "Your team handled the cancellation {when} superbly; we were rebooked within minutes.",
            "{crew_cap} carried my bag up the stairs, which I could not have managed alone. Please thank them "
            "for me.",
            "Your lost property team returned my {item} within a day. Excellent service.",
            "The staff who helped {person} with the {aid} at {port2} were patient and kind.",
            "Having complained last year, I feel it only fair to say that the service this summer has been "
            "excellent.",
            "The refund was processed quickly and the staff on the phone were courteous throughout.",
            "Everything ran to time {when} and the ticket check at {port} took no time at all.",
            "I would like to nominate {crew} for whatever award you give your staff.",
        ],
        "informal": [
            "best crossing ever, saw dolphins off {island}!! crew were ace",
            "shoutout to {crew} on the {time}, absolute legend",
            "just wanted to say the cafe on {boat} does a cracking bacon roll",
            "lovely trip {when}, flat calm and friendly staff",
            "you lot are brilliant, sorted my ticket in seconds",
            "cheers to whoever found my {item} and handed it in, made my week",
            "{boat} is class after the refit, loads of room for the bikes",
            "crew were so patient with my two kids, much appreciated",
            "boat was late but honestly the crew made up for it, really nice bunch",
            "10/10 crossing, would sail again",
            "big thanks to {crew} for helping my dad with his {aid}",
        ],
        "short": [
            "great crossing {when}",
            "crew on the {time} were lovely",
            "well done {port} staff",
            "love {boat}",
            "superb service today",
        ],
        "detail": [
            "It made our holiday.",
            "Honestly made my day.",
            "We'll definitely be back next year.",
            "Do pass this on to their manager.",
            "You don't hear enough good news so I thought I'd write.",
            "keep it up",
        ],
        "aside": [
            "The crew were lovely, by the way.",
            "Your staff at {port} have always been very helpful.",
            "love the new seats btw",
        ],
    },
}
GREETINGS = {
    "formal": [
        "Dear Merrowlight team,",
        "Hello,",
        "Good morning,",
        "Good afternoon,",
        "To whom it may concern,",
        "Dear Sir or Madam,",
    ],
    "informal": ["hi", "hey", "hiya,", "hello!", "quick one -", "hi there,", "morning,"],
}
CLOSINGS = {
    "formal": [
        "Kind regards, {name}.",
        "Thank you in advance.",
        "I look forward to your reply.",
        "Many thanks, {name}",
        "Yours faithfully, {name}",
        "With thanks.",
    ],
    "informal": ["cheers", "thanks", "ta", "thx!", "cheers, {name}", "thanks in advance x", "ta very much"],
}
CONTEXT = {
    "formal": [
        "I travel to {island} most weeks for work.",
        "We are staying on {island} for a fortnight.",
        "I booked online last month.",
        "We are a family of four travelling with a car.",
        "This is our first time using your boats.",
        "I live on {island} and use the ferry daily.",
    ],
    "informal": [
        "live on {island} btw.",
        "first time on the boat.",
        "we're over on {island} for the week.",
        "booked through the website.",
        "i commute on the {time} most days.",
    ],
}


def ferry_slots(rng: random.Random) -> dict[str, str]:
    """One random filler per slot; a template uses whichever it names."""
    port, port2 = rng.sample(PORTS, 2)
    slots = {
        "island": pick(rng, ISLANDS),
        "port": port,
        "port2": port2,
        "boat": pick(rng, BOATS),
        "day": pick(rng, DAYS),
        "time": pick(rng, TIMES),
        "when": pick(rng, WHEN),
        "future": pick(rng, FUTURE),
        "season": pick(rng, SEASONS),
        "person": pick(rng, PEOPLE),
        "aid": pick(rng, AIDS),
        "item": pick(rng, ITEMS),
        "crew": pick(rng, CREW),
        "amount": pick(rng, AMOUNTS),
        "colour": pick(rng, COLOURS),
        "name": pick(rng, NAMES),
        "ref": f"MF{rng.randrange(100000, 999999)}",
    }
    for key in ("person", "crew", "boat"):
        slots[key + "_cap"] = slots[key][0].upper() + slots[key][1:]
    return slots


def ferry_message(label: str, rng: random.Random) -> str:
    """One passenger message whose main topic is `label`."""
    t = FERRY_TEMPLATES[label]
    s = ferry_slots(rng)
    if rng.random() < 0.16:  # terse one-liners, as typed into a chat box
        text = pick(rng, t["short"]).format(**s)
        return add_typos(text, rng) if rng.random() < 0.3 else text
    register = "formal" if rng.random() < 0.45 else "informal"
    parts = []
    if rng.random() < 0.5:
        parts.append(pick(rng, GREETINGS[register]))
    if rng.random() < 0.25:
        parts.append(pick(rng, CONTEXT[register]))
    parts.append(pick(rng, t[register]))
    if rng.random() < 0.35:
        parts.append(pick(rng, t["detail"]))
    if rng.random() < 0.22:  # a second, minor topic; the label stays the main one
        other = pick(rng, [lab for lab in FERRY_LABELS if lab != label])
        parts.append(pick(rng, FERRY_TEMPLATES[other]["aside"]))
    if rng.random() < 0.4:
        parts.append(pick(rng, CLOSINGS[register]))
    text = " ".join(p.format(**s) for p in parts)
    if register == "informal" and rng.random() < 0.4:
        text = text.lower()
    if rng.random() < (0.35 if register == "informal" else 0.12):
        text = add_typos(text, rng)
    return one_line(text)


def make_ferry(rng: random.Random) -> tuple[dict[str, list[dict]], int]:
    """Unique messages per label, a stratified split, then label noise and ids; also the flip count."""
    rows: list[dict] = []
    seen: dict[str, None] = {}
    for label in FERRY_LABELS:
        made = 0
        while made < FERRY_COUNTS[label]:
            text = ferry_message(label, rng)
            key = dedupe_key(text)
            if key not in seen:
                seen[key] = None
                rows.append({"text": text, "label": label})
                made += 1
    splits = split_by_label(rows, rng)
    flipped = 0
    for split in SPLITS:
        flipped += flip_labels(splits[split], FERRY_LABELS, FERRY_NOISE, rng)
        for i, row in enumerate(splits[split], start=1):
            splits[split][i - 1] = {"id": f"fm-{split}-{i:04d}", **row}
    return splits, flipped


# ---------------------------------------------------------------- reply_check: Hollowmere Broadband
# Invented scenario: a home-internet provider with "Meadow" plans and a "Hub 3" router.

REPLY_LABELS = ["resolves", "does_not_resolve"]
REPLY_COUNTS = {"resolves": 330, "does_not_resolve": 270}
REPLY_NOISE = 0.03
# How a non-resolving reply fails, with weights; "wrong_detail" right topic but wrong date/port/plan.
MISS_KINDS = {"boilerplate": 18, "deflection": 20, "other_topic": 27, "on_topic": 27, "wrong_detail": 8}

PLANS = [("Meadow 80", 80, 24), ("Meadow 300", 300, 32), ("Meadow 500", 500, 38), ("Meadow 900", 900, 45)]
TOWNS = ["Amberleigh", "Cotterstone", "Wrenfold", "Dunholt", "Marsh Tarrant", "Kelby Cross", "Upper Sowe"]
DATES = [
    "Monday 3rd",
    "the 14th",
    "Thursday 9 May",
    "this Friday",
    "next Tuesday",
    "the 21st",
    "Wednesday 28th",
]
NTHS = ["1st", "5th", "10th", "15th", "20th", "28th"]
GAME_PORTS = ["3074", "25565", "27015", "9308", "3478", "7777"]
DEVICES = ["games console", "game server on my PC", "camera recorder", "home NAS", "media server"]
HUBS = ["Hub 3", "Hollowmere Hub 3", "router", "hub"]
FIX_TIMES = ["3pm", "4pm", "6pm", "8pm", "midnight"]

# Per topic: questions, replies that settle it, on-topic replies that do not, and the slots that a
# wrong-detail reply gets wrong (empty: that topic has no such variant).
TOPICS: dict[str, dict[str, list[str]]] = {
    "red_light": {
        "q": [
            "My {hub} has had a flashing red light since {day} and I've already restarted it twice. What's wrong?",
            "The light on my router keeps blinking red and there's no internet. I've turned it off and on already.",
            "red light on the hub again, restarted it, still nothing. help?",
            "Why is the light on my {hub} red? Internet has been down since {day} even after a reboot.",
        ],
        "yes": [
            "A flashing red light on the {hub} means it can't see the line. I've run a test from our side and "
            "there's a fault at the street cabinet, so an engineer will fix it on {date} between 8am and 1pm; "
            "you don't need to be home.",
            "Red means no signal from the line. Please check the grey cable is pushed fully into the socket "
            "marked DSL on the back of the hub: our line test shows the line itself is fine, so a loose cable "
            "is the likely cause. The light should turn white within two minutes.",
            "Sorry about this. The red light is caused by a fault on the line into your home, which our test "
            "confirms. I've booked an engineer for {date}, morning slot, and added a credit for the days "
            "without service.",
        ],
        "no": [
            "Have you tried turning your hub off and on again? Leave it off for 30 seconds before switching it on.",
            "The lights on your hub show its current status. A guide to what each colour means is in the leaflet "
            "that came with it.",
            "Router lights can change colour for a number of reasons. Please let us know if the problem continues.",
        ],
        "detail": ["date"],
    },
    "slow_evening": {
        "q": [
            "Every evening from about 7pm my speed on {plan} drops to under 5 Mbps. Daytime is fine. Why?",
            "Internet crawls at night, fine in the morning. Paying for {plan}. What's going on?",
            "Our broadband slows right down after the kids get home from school: we're on {plan} and get about a "
            "tenth of that in the evenings. Is it your network?",
        ],
        "yes": [
            "I've checked your line: the evening slowdown comes from a busy link at the {town} exchange. We're "
            "adding capacity there on {date}, and meanwhile I've moved you to a less congested route, so you "
            "should see close to {speed} Mbps again from tonight.",
            "Your daytime speeds show the line is healthy, so the evening drop is congestion on our side in "
            "{town}. An upgrade for the exchange is booked for {date}, and I've applied a £10 credit for the "
            "poor service until then.",
            "Looking at your hub's logs, the slowdown is on your Wi-Fi rather than the line: at night it picks a "
            "crowded channel. I've fixed the hub on channel 36 remotely, which should bring you back to around "
            "{speed} Mbps near the hub.",
        ],
        "no": [
            "Speeds can vary depending on many factors, including the number of devices connected and the time "
            "of day.",
            "Our {plan} plan offers speeds of up to {speed} Mbps. Actual speeds may vary.",
            "Have you run a speed test? You can find one on our website.",
        ],
        "detail": [],
    },
    "billing_date": {
        "q": [
            "Can I change the date my direct debit comes out to the {nth}? My payday has moved.",
            "I'd like my monthly payment taken on the {nth} instead of the current date, please.",
            "is it possible to move my bill date to the {nth} of each month",
        ],
        "yes": [
            "Done: from next month your direct debit will be taken on the {nth}. This month's payment stays on "
            "the old date, and you'll get an email confirming the change.",
            "No problem. I've moved your payment date to the {nth}. Because the new date is later, next month's "
            "bill will include a few extra days, about £3, and after that it's your usual amount.",
            "Yes, I've updated your account so payments come out on the {nth} from next month onwards.",
        ],
        "no": [
            "Your bill is issued monthly and payment is collected by direct debit on your billing date.",
            "You can view all your past bills in the My Hollowmere app.",
            "Paying by direct debit is the easiest way to make sure your bill is always paid on time.",
        ],
        "detail": ["nth"],
    },
    "moving": {
        "q": [
            "We're moving to {town2} on {date}. Can I take my broadband with me, and will there be a gap?",
            "Moving house on {date}, new place is in {town2}. What do I need to do to keep my internet?",
            "hi, moving to {town2} soon ({date}), can i keep my contract or do i have to cancel",
        ],
        "yes": [
            "Good news: {town2} is on our network. I've booked your move for {date}, so service ends at your "
            "old home that morning and goes live at the new address by 6pm. Take your hub with you; your "
            "contract carries on unchanged.",
            "Yes, you can keep your contract. I've set the transfer for {date}. There's no charge, and because "
            "the new address already has a Hollowmere line, no engineer visit is needed.",
            "I've checked {town2} and we can connect you there. The move is booked for {date}; expect to be "
            "offline for a few hours at most that day. Bring your hub and its power lead.",
        ],
        "no": [
            "Congratulations on your move! Moving house is always a busy time, so do get in touch whenever "
            "you're ready.",
            "When you move, please remember to update your address on your account.",
            "We offer broadband in many areas. Availability depends on your address.",
        ],
        "detail": ["date", "town2"],
    },
    "wifi_password": {
        "q": [
            "How do I change my Wi-Fi password? I think the neighbours are using it.",
            "I want to set a new Wi-Fi password on my {hub}. Where do I do that?",
            "what's the way to change the wifi name and password on your router",
        ],
        "yes": [
            "Type 192.168.1.254 into a browser on a device connected to the hub, log in with the admin code on "
            "the sticker under the {hub}, then choose Wireless > Security and enter the new password. Devices "
            "will need to rejoin with it.",
            "The easiest way is the My Hollowmere app: tap Hub, then Wi-Fi settings, then Change password. The "
            "new password applies in about a minute, and any device you don't reconnect, the neighbours' "
            "included, drops off.",
            "Log in to the hub at 192.168.1.254 (the admin code is on the back), open Wireless settings, change "
            "the network name and the password there, then press Save.",
        ],
        "no": [
            "Keeping your Wi-Fi secure is very important. We recommend using a strong password.",
            "Your Wi-Fi password is printed on the card that came with your {hub}.",
            "For security reasons we can't discuss passwords over chat.",
        ],
        "detail": [],
    },
    "engineer": {
        "q": [
            "I can't be home for the engineer on {date}. Can you move it to {date2}?",
            "Need to rebook my installation appointment from {date} to {date2} if possible, work has come up.",
            "engineer booked {date}, can't do it. {date2} any good?",
        ],
        "yes": [
            "I've moved your appointment to {date2}, 1pm to 6pm. You'll get a text the day before, and the "
            "{date} visit is cancelled.",
            "Yes, {date2} is free. The engineer will now come that day between 8am and 1pm, and you'll get a "
            "confirmation email within the hour.",
            "All sorted: your engineer visit is now on {date2} in the afternoon slot. Nothing else changes "
            "with your order.",
        ],
        "no": [
            "Our engineers are fully trained and will always arrive within the booked time slot.",
            "Please make sure someone over 18 is at home for the engineer's visit.",
            "Appointments can be changed up to 24 hours before the visit.",
        ],
        "detail": ["date2"],
    },
    "outage": {
        "q": [
            "No internet in {town} since this morning. Is there an outage?",
            "Is there a problem in the {town} area? My whole street has lost broadband.",
            "internet down in {town}?? neighbours too",
        ],
        "yes": [
            "Yes, there's a known fault in {town}: a cable was damaged by roadworks this morning. Engineers are "
            "on site and expect service back by {fix}; your hub will reconnect by itself.",
            "I'm sorry for the disruption. We have a confirmed outage in part of {town} after a power failure at "
            "the local cabinet. It's due to be fixed by {fix} today and we'll text you when it's back.",
            "I've checked and there is an outage in {town}. It's being repaired now, with an estimated fix of "
            "{fix}, and affected customers will get an automatic credit.",
        ],
        "no": [
            "You can check the status of our network at any time on the service status page.",
            "We're sorry to hear you're having trouble. Please restart your hub and try again.",
            "Outages are rare, and we work hard to keep our network running.",
        ],
        "detail": ["town"],
    },
    "exit_fee": {
        "q": [
            "How much would it cost to leave my {plan} contract early? I have {months} months left.",
            "What's the early exit fee if I cancel now? About {months} months remaining on my contract.",
            "thinking of leaving, what do i owe if i go before the contract ends ({months} months left)",
        ],
        "yes": [
            "With {months} months left on {plan} at £{price} a month, the early exit charge is £{fee}. Give us "
            "30 days' notice and the charge will be on your final bill.",
            "Your early termination charge would be £{fee}: the {months} remaining months at £{price}. There are "
            "no other fees, and you keep the hub.",
            "Leaving now would cost £{fee} ({months} months x £{price}). If you're moving somewhere we can't "
            "reach, that fee is waived.",
        ],
        "no": [
            "We'd be sorry to see you go! Have you seen our latest offers for existing customers?",
            "Early exit fees may apply if you leave before the end of your minimum term.",
            "To cancel your contract, please call our customer retention team.",
        ],
        "detail": ["months", "fee", "price", "plan"],  # redrawn together so the sum still adds up
    },
    "static_ip": {
        "q": [
            "Do you offer a static IP address? I need one to reach my {device} remotely.",
            "I work from home and my VPN needs a fixed IP. Can I get one on {plan}?",
            "can i get a static ip, how much",
        ],
        "yes": [
            "Yes: a static IP is a £5 a month add-on. I've added it to your account now; it's assigned within "
            "two hours, and you'll find the address under My Hollowmere > Extras.",
            "We do. On {plan} a static IP costs £5 a month with no setup fee. Reply YES and I'll add it today; "
            "the hub picks up the fixed address after its next restart.",
            "Static IPs are £5 a month on all plans, including {plan}. Switch it on yourself under Account > "
            "Extras > Static IP, and it's active within the hour.",
        ],
        "no": [
            "IP addresses are assigned automatically to all customers.",
            "For business-grade features, please see Hollowmere Business.",
            "Our network uses the latest technology to give you a reliable connection.",
        ],
        "detail": [],
    },
    "upgrade": {
        "q": [
            "I'm on {plan} and want to go up to {up_plan}. How much is it and does my contract restart?",
            "What would {up_plan} cost me, and when could it start? Currently on {plan}.",
            "upgrade to {up_plan}? price pls",
        ],
        "yes": [
            "{up_plan} at your address is £{up_price} a month. Upgrading starts a new 18-month term, but "
            "there's no fee, and I can switch you over on {date}.",
            "You can upgrade to {up_plan} for £{up_price} a month. Your contract restarts for 18 months from the "
            "switch; the earliest date is {date}, and your hub already supports the faster speed.",
            "Yes, {up_plan} is available to you at £{up_price} a month, starting {date}. The contract resets to "
            "18 months; you won't need a new hub.",
        ],
        "no": [
            "We have a range of plans to suit every household. Take a look at our website to compare them.",
            "{plan} is one of our most popular plans and is ideal for most homes.",
            "Thanks for your interest in upgrading! Our sales team will be happy to help.",
        ],
        "detail": ["up_plan", "up_price"],
    },
    "parental": {
        "q": [
            "How do I stop my kids getting on the internet after 9pm?",
            "Is there a way to block adult sites on my children's tablets?",
            "parental controls on the {hub}? where",
        ],
        "yes": [
            "Open the My Hollowmere app, tap Safe Browse and switch it on. Under Bedtime you can pause the "
            "internet for chosen devices, for example the kids' tablets from 9pm to 7am.",
            "Turn on Safe Browse in My Hollowmere > Hub > Family: it blocks adult sites on every device, and you "
            "can add a schedule that cuts off named devices at 9pm.",
            "Log in to the hub at 192.168.1.254, go to Family settings, pick your children's devices and set an "
            "off time. Safe Browse on the same page filters adult content.",
        ],
        "no": [
            "We take online safety very seriously and recommend talking to your children about staying safe.",
            "There are many parental control apps available for phones and tablets.",
            "Parental controls are a great way to keep your family safe.",
        ],
        "detail": [],
    },
    "port_forward": {
        "q": [
            "How do I open port {gport} on the {hub} for my {device}?",
            "My {device} says the NAT type is strict. Can I forward port {gport}?",
            "need port {gport} forwarded for the {device}, how",
        ],
        "yes": [
            "Log in at 192.168.1.254, go to Advanced > Port Forwarding, add a rule for port {gport} (TCP and "
            "UDP) pointing at your {device}, and save. Restart the {device} afterwards.",
            "In the hub settings open Advanced > Port Forwarding and create a rule: external and internal port "
            "{gport}, protocol Both, device = your {device}. It takes effect straight away.",
            "You can do it from the app: Hub > Advanced > Port forwarding > Add. Choose your {device} from the "
            "list and enter {gport} as the port.",
        ],
        "no": [
            "Unfortunately we can't give support for third-party devices.",
            "Port forwarding is an advanced setting and changing it may affect your security.",
            "For gaming we recommend a wired connection for the best experience.",
        ],
        "detail": ["gport"],
    },
    "late_fee": {
        "q": [
            "I was charged an £8 late payment fee but I paid on the {nth}, before the due date. Can you remove it?",
            "Why did I get a late fee this month? My payment went out on time.",
            "you charged me a late fee when i paid early, want it taken off",
        ],
        "yes": [
            "You're right: your payment reached us on the {nth}, before the due date. I've removed the £8 fee, "
            "and you'll see it as a credit on your next bill.",
            "I've looked into this and the fee was added in error after a delay at our bank. I've refunded the "
            "£8 to your card; it should show within 3 to 5 working days.",
            "Sorry about that. The payment was on time, so I've cancelled the late payment charge and noted "
            "your account so it won't happen again.",
        ],
        "no": [
            "Late payment fees are charged when a payment is not received by the due date.",
            "Setting up a direct debit is the best way to avoid late payment fees.",
            "You can find details of all our charges in our price guide.",
        ],
        "detail": [],
    },
    "outage_credit": {
        "q": [
            "My internet was down for {days} days last week. Am I due any money back?",
            "We had no broadband for {days} days. Will you credit my account?",
            "{days} days no internet. compensation??",
        ],
        "yes": [
            "Yes. As your service was down for {days} days, I've applied a credit of £{credit} to your account; "
            "it will show on your next bill.",
            "I'm sorry for the {days} days without service. I've added £{credit} in automatic compensation plus "
            "a £5 goodwill credit, both on your next bill.",
            "You're entitled to compensation for the outage. I've credited £{credit} for the {days} days, which "
            "you'll see on your next statement.",
        ],
        "no": [
            "We aim to keep disruption to a minimum and apologise for any inconvenience caused.",
            "Outages can happen for many reasons, some outside our control.",
            "Please check your hub is working correctly and let us know if you have any other issues.",
        ],
        "detail": ["days", "credit"],
    },
    "dead_spot": {
        "q": [
            "The Wi-Fi doesn't reach the bedrooms upstairs. What can I do?",
            "Is there an extender that works with the {hub}? Signal is terrible in the kitchen.",
            "wifi dead upstairs, any fix",
        ],
        "yes": [
            "Our Meadow Disc works with the {hub} to fill dead spots. I've sent you one free of charge, arriving "
            "{date}; plug it in halfway between the hub and the bedrooms and press the pair button on both.",
            "First move the hub off the floor and away from the TV; that alone often fixes upstairs signal. If "
            "it doesn't, our Meadow Disc extender is £4 a month and I can post one today.",
            "A Meadow Disc will fix that. It pairs with the {hub} automatically. I've added one to your account "
            "at no cost, arriving {date}.",
        ],
        "no": [
            "Wi-Fi signal can be affected by thick walls, mirrors and other obstructions.",
            "The {hub} has the most advanced Wi-Fi we've ever offered.",
            "Many customers find their Wi-Fi works perfectly throughout their home.",
        ],
        "detail": [],
    },
}
BOILERPLATE = [
    "Thank you for contacting Hollowmere Broadband. Your query is important to us. You can find answers to many "
    "common questions in our Help Centre.",
    "Thanks for getting in touch! For help with this and other topics, visit our help pages or use the My "
    "Hollowmere app.",
    "Thank you for your message. We are experiencing a high volume of contacts and will respond as soon as possible.",
    "Hi {name}, thanks for reaching out to Hollowmere. Is there anything else I can help you with today?",
    "Thank you for being a valued Hollowmere customer. Please rate your experience with us today.",
]
DEFLECTIONS = [
    "I completely understand your frustration, and I'm sorry for the inconvenience. I've passed your message to "
    "the relevant team, who will be in touch.",
    "Thanks for your patience. This isn't something I can help with on chat, so please call us between 8am and 8pm.",
    "I'm sorry to hear that. I've raised this internally and someone will get back to you within 5 to 7 working days.",
    "That's a great question! Let me look into it and get back to you.",
    "I've noted your comments on your account. Is there anything else I can help with?",
    "I'm afraid I don't have access to that information, but our specialist team will be able to help.",
]
# Padding shared by good and bad replies, so politeness alone says nothing about the label.
REPLY_OPENERS = [
    "",
    "",
    "Hi {name}, ",
    "Thanks for getting in touch. ",
    "Sorry for the trouble. ",
    "Thanks for your patience. ",
]
REPLY_CLOSERS = [
    "",
    "",
    " Is there anything else I can help with?",
    " Thanks for contacting Hollowmere.",
    " Have a good day.",
]
Q_OPENERS = ["", "", "Hi, ", "Hello, ", "hey ", "Good evening. "]
Q_CONTEXT = [
    "",
    "",
    "",
    " My account number is {account}.",
    " I've been with you {years} years.",
    " This is the second time I'm asking.",
    " Thanks in advance.",
    " - {name}",
]
REPLY_NAMES = [
    "Sam",
    "Anita",
    "Mr Okafor",
    "Gwen",
    "Dev",
    "Ms Lindqvist",
    "Rory",
    "Hana",
    "Joe",
    "Mrs Adeyemi",
]


def reply_slots(rng: random.Random) -> dict[str, str]:
    """Fillers shared by a question and its reply, so a good reply can echo the question's specifics."""
    i = rng.randrange(len(PLANS) - 1)
    plan, speed, price = PLANS[i]
    up_plan, _, up_price = PLANS[rng.randrange(i + 1, len(PLANS))]
    town, town2 = rng.sample(TOWNS, 2)
    date, date2 = rng.sample(DATES, 2)
    months, days = rng.randrange(2, 15), rng.randrange(2, 7)
    return {
        "plan": plan,
        "speed": str(speed),
        "price": str(price),
        "up_plan": up_plan,
        "up_price": str(up_price),
        "town": town,
        "town2": town2,
        "date": date,
        "date2": date2,
        "nth": pick(rng, NTHS),
        "months": str(months),
        "fee": str(months * price),
        "days": str(days),
        "credit": f"{price * days / 30:.2f}",
        "gport": pick(rng, GAME_PORTS),
        "device": pick(rng, DEVICES),
        "hub": pick(rng, HUBS),
        "fix": pick(rng, FIX_TIMES),
        "day": pick(rng, DAYS),
        "name": pick(rng, REPLY_NAMES),
        "account": f"HM{rng.randrange(1000000, 9999999)}",
        "years": str(rng.randrange(2, 12)),
    }


def reply_pair(label: str, rng: random.Random) -> tuple[str, str]:
    """One (question, reply); for does_not_resolve the way the reply misses is drawn from MISS_KINDS."""
    topic = pick(rng, sorted(TOPICS))
    t = TOPICS[topic]
    s = reply_slots(rng)
    question = pick(rng, Q_OPENERS) + pick(rng, t["q"]) + pick(rng, Q_CONTEXT)
    question = question.format(**s)
    if rng.random() < 0.2:
        question = add_typos(question, rng)
    if label == "resolves":
        body = pick(rng, t["yes"]).format(**s)
    else:
        kind = rng.choices(sorted(MISS_KINDS), weights=[MISS_KINDS[k] for k in sorted(MISS_KINDS)])[0]
        if kind == "wrong_detail" and not t["detail"]:
            kind = "on_topic"
        if kind == "boilerplate":
            body = pick(rng, BOILERPLATE).format(**s)
        elif kind == "deflection":
            body = pick(rng, DEFLECTIONS)
        elif kind == "on_topic":
            body = pick(rng, t["no"]).format(**s)
        elif kind == "other_topic":  # a good answer, to somebody else's question
            other = pick(rng, [k for k in sorted(TOPICS) if k != topic])
            body = pick(rng, TOPICS[other]["yes"]).format(**reply_slots(rng))
        else:  # right topic, wrong specifics: redraw the slots this topic's question pins down
            wrong = dict(s)
            while all(wrong[k] == s[k] for k in t["detail"]):
                fresh = reply_slots(rng)
                wrong.update({k: fresh[k] for k in t["detail"]})
            body = pick(rng, t["yes"]).format(**wrong)
    reply = pick(rng, REPLY_OPENERS).format(**s) + body + pick(rng, REPLY_CLOSERS)
    return one_line(question), one_line(reply)


def make_reply(rng: random.Random) -> tuple[dict[str, list[dict]], int]:
    """Pairs whose question and reply are each unique across the task; split, noise, ids, flip count."""
    rows: list[dict] = []
    seen: dict[str, None] = {}
    for label in REPLY_LABELS:
        made = 0
        while made < REPLY_COUNTS[label]:
            question, reply = reply_pair(label, rng)
            keys = ("q " + dedupe_key(question), "r " + dedupe_key(reply))
            if not any(k in seen for k in keys):
                seen.update(dict.fromkeys(keys))
                rows.append({"question": question, "reply": reply, "label": label})
                made += 1
    splits = split_by_label(rows, rng)
    flipped = 0
    for split in SPLITS:
        flipped += flip_labels(splits[split], REPLY_LABELS, REPLY_NOISE, rng)
        for i, row in enumerate(splits[split], start=1):
            splits[split][i - 1] = {"id": f"rc-{split}-{i:04d}", **row}
    return splits, flipped


# ---------------------------------------------------------------- READMEs and entry point

FERRY_README = """# ferry_messages (invented demo data)

Passenger messages to Merrowlight Ferries, an invented ferry line sailing from Port Aldwick to the
invented Caddon Isles (Inchcaddon, Rona Beg, Tullagh, Skarra, Little Fenna). Every message is made up
from templates and slot fillers by `python scripts/make_sample_tasks.py` (seeded, so re-running it gives
byte-identical files). It is demo data for trying the harness; it must not be used to judge how a
method performs on real-world text.

Columns: `id` (e.g. `fm-train-0001`), `text` (one line), `label` (the main topic; a message may mention
a second one). Labels: {labels}.

The text has typos, formal and chatty registers, short and long messages, and shared words across
classes. About {noise:.0%} of the labels in each split are deliberately wrong ({flipped} rows in all).
No text occurs in two splits.

Label counts:

{table}
Best single-word one-vs-rest rule on train (word: F1): {keywords}.
"""

REPLY_README = """# reply_check (invented demo data)

A customer question to Hollowmere Broadband, an invented home-internet provider, and one agent reply.
`resolves` means the reply actually settles that specific question; `does_not_resolve` covers polite
deflections, generic boilerplate, on-topic replies that say nothing useful, good answers to a different
question, and right-topic answers with the wrong date, plan or port. Made by
`python scripts/make_sample_tasks.py` (seeded, so re-running it gives byte-identical files). It is demo
data for trying the harness; it must not be used to judge how a method performs on real-world text.

Columns: `id` (e.g. `rc-train-0001`), `question`, `reply` (each one line), `label`. About {noise:.0%} of the
labels in each split are deliberately wrong ({flipped} rows in all). No question and no reply occurs
twice, so none is shared between splits.

Label counts:

{table}
Best single-word rule on train over question + reply (word: F1): {keywords}.
"""


def keyword_report(rows: list[dict], labels: list[str], fields: list[str]) -> str:
    """'label: word F1' for each label, on the given rows."""
    texts = [" ".join(r[f] for f in fields) for r in rows]
    y = [r["label"] for r in rows]
    parts = []
    for label in labels:
        word, f1 = best_keyword_f1(texts, y, label)
        parts.append(f"{label}: `{word}` {f1:.2f}")
    return "; ".join(parts)


def main() -> None:
    """Build both tasks from one seeded generator and write CSVs plus READMEs."""
    rng = random.Random(SEED)
    tasks = [
        ("ferry_messages", *make_ferry(rng), FERRY_LABELS, ["text"], FERRY_NOISE, FERRY_README),
        ("reply_check", *make_reply(rng), REPLY_LABELS, ["question", "reply"], REPLY_NOISE, REPLY_README),
    ]
    for name, splits, flipped, labels, fields, noise, readme in tasks:
        for split in SPLITS:
            write_csv(OUT / name / f"{split}.csv", ["id", *fields, "label"], splits[split])
        keywords = keyword_report(splits["train"], labels, fields)
        text = readme.format(
            labels=", ".join(f"`{lab}`" for lab in labels),
            noise=noise,
            flipped=flipped,
            table=count_table(splits, labels),
            keywords=keywords,
        )
        (OUT / name / "README.md").write_text(text, encoding="utf-8")
        print(f"{name}: " + ", ".join(f"{s}={len(splits[s])}" for s in SPLITS) + f"; best keyword {keywords}")


if __name__ == "__main__":
    main()
