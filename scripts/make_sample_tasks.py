"""Write the two invented demo tasks under sample_tasks/ (seeded, reproducible).

ferry_messages: passenger messages to Merrowlight Ferries, an invented island ferry line, five labels.
reply_check:    a customer question and an agent's reply at Hollowmere Broadband, an invented home-internet
                provider, labelled resolves / does_not_resolve.

Every text comes from templates x slot fillers, with seeded typos, mixed registers and a little label
noise, so neither task can be solved by one keyword. The words are data files beside this script, in
sample_tasks_data/: per task, <task>.yaml holds the templates and slot fillers, <task>.README.template.md
the README text. Standard library plus PyYAML. Run: python scripts/make_sample_tasks.py
"""

from __future__ import annotations

import csv
import random
import re
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any, NamedTuple, NoReturn

import yaml

SEED = 2026
OUT = Path(__file__).resolve().parent.parent / "sample_tasks"
DATA = Path(__file__).resolve().parent / "sample_tasks_data"
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


# ---------------------------------------------------------------- data files


def read_data(name: str) -> str:
    """Text of one file in DATA; a missing or unreadable file stops the run with one line naming it."""
    path = DATA / name
    try:
        return path.read_text(encoding="utf-8")
    except OSError as e:
        raise SystemExit(f"make_sample_tasks: cannot read data file {path}: {e.strerror or e}") from None


class Phrases:
    """One YAML file of phrase lists; a missing or malformed entry stops the run with one line naming
    the file and the key."""

    def __init__(self, name: str) -> None:
        self.path = DATA / name
        try:
            self.root: Any = yaml.safe_load(read_data(name))
        except yaml.YAMLError as e:
            mark = getattr(e, "problem_mark", None)
            where = f" at line {mark.line + 1}" if mark is not None else ""
            raise SystemExit(f"make_sample_tasks: {self.path}: not valid YAML{where}") from None
        if not isinstance(self.root, dict):
            raise SystemExit(f"make_sample_tasks: {self.path}: not a mapping of phrase lists")

    def get(self, *keys: str, kind: type = dict) -> Any:
        """The value under a path of keys, which must be a `kind`; each step on the way is a mapping."""
        node = self.root
        for i, key in enumerate(keys, start=1):
            if key not in node:
                quote = not all(isinstance(k, str) for k in node)
                self.fail(keys[:i], "is missing" + (" (quote keys such as yes and no)" if quote else ""))
            node = node[key]
            want = kind if i == len(keys) else dict
            if not isinstance(node, want):
                self.fail(keys[:i], "is not a mapping" if want is dict else "is not a list")
        return node

    def strings(self, *keys: str, empty_ok: bool = False) -> list[str]:
        """The list of strings under a path of keys, in file order; empty only if `empty_ok`."""
        value = self.get(*keys, kind=list)
        for i, item in enumerate(value, start=1):
            if not isinstance(item, str):
                self.fail(keys, f"item {i} was read as {item!r}, not as text: put it in double quotes")
        if not value and not empty_ok:
            self.fail(keys, "is an empty list")
        return value

    def table(self, *keys: str, names: Iterable[str]) -> dict[str, list[str]]:
        """{name: list of strings} for each of `names` under a path of keys, in the order of `names`."""
        return {name: self.strings(*keys, name) for name in names}

    def fail(self, keys: tuple[str, ...], problem: str) -> NoReturn:
        raise SystemExit(f"make_sample_tasks: {self.path}: key '{'.'.join(keys)}' {problem}")


# ---------------------------------------------------------------- one task


class Task(NamedTuple):
    """One demo task: its columns, labels and sizes, and the function that draws one row's texts."""

    name: str
    prefix: str  # of the ids
    fields: list[str]  # the text columns
    labels: list[str]
    counts: dict[str, int]  # rows per label
    noise: float  # share of labels flipped in each split
    draw: Callable[[str, random.Random], tuple[str, ...]]  # (label, rng) -> one text per field


def make_task(task: Task, rng: random.Random) -> tuple[dict[str, list[dict]], int]:
    """Rows with no text twice in a column, a stratified split, then label noise and ids; also the flip
    count."""
    rows: list[dict] = []
    seen: set[str] = set()
    for label in task.labels:
        made = 0
        while made < task.counts[label]:
            row = dict(zip(task.fields, task.draw(label, rng), strict=True))
            keys = {f"{field} {dedupe_key(text)}" for field, text in row.items()}
            if seen.isdisjoint(keys):
                seen |= keys
                rows.append({**row, "label": label})
                made += 1
    splits = split_by_label(rows, rng)
    flipped = 0
    for split in SPLITS:
        flipped += flip_labels(splits[split], task.labels, task.noise, rng)
        for i, row in enumerate(splits[split], start=1):
            splits[split][i - 1] = {"id": f"{task.prefix}-{split}-{i:04d}", **row}
    return splits, flipped


# ---------------------------------------------------------------- ferry_messages: Merrowlight Ferries
# Invented scenario: one mainland port (Port Aldwick) and five small islands in the Caddon Isles.

FERRY_LABELS = ["schedule", "refund", "accessibility", "lost_item", "praise"]
# Imbalanced on purpose: timetable questions dominate a real inbox, thank-you notes are rare.
FERRY_COUNTS = {"schedule": 270, "refund": 216, "accessibility": 162, "lost_item": 150, "praise": 102}
FERRY_NOISE = 0.04
REGISTERS = ("formal", "informal")
# Slots filled by one pick each, in this order (the seeded output depends on it); port and port2 are a
# sample of two, drawn first.
FERRY_PICKS = "island boat day time when future season person aid item crew amount colour name".split()

FERRY_DATA = Phrases("ferry_messages.yaml")
FERRY_FILL = FERRY_DATA.table("slots", names=("port", *FERRY_PICKS))
# Per label: formal and informal core sentences, short one-liners, follow-up details, and an aside used
# when the label is the *second* topic of a message about something else.
FERRY_TEMPLATES = {
    lab: FERRY_DATA.table("templates", lab, names=(*REGISTERS, "short", "detail", "aside"))
    for lab in FERRY_LABELS
}
GREETINGS = FERRY_DATA.table("greetings", names=REGISTERS)
CLOSINGS = FERRY_DATA.table("closings", names=REGISTERS)
CONTEXT = FERRY_DATA.table("context", names=REGISTERS)


def ferry_slots(rng: random.Random) -> dict[str, str]:
    """One random filler per slot; a template uses whichever it names."""
    port, port2 = rng.sample(FERRY_FILL["port"], 2)
    slots = {"port": port, "port2": port2, **{key: pick(rng, FERRY_FILL[key]) for key in FERRY_PICKS}}
    slots["ref"] = f"MF{rng.randrange(100000, 999999)}"
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


def ferry_row(label: str, rng: random.Random) -> tuple[str]:
    """The text column of one ferry_messages row."""
    return (ferry_message(label, rng),)


# ---------------------------------------------------------------- reply_check: Hollowmere Broadband
# Invented scenario: a home-internet provider with "Meadow" plans and a "Hub 3" router.

REPLY_LABELS = ["resolves", "does_not_resolve"]
REPLY_COUNTS = {"resolves": 330, "does_not_resolve": 270}
REPLY_NOISE = 0.03
# How a non-resolving reply fails, with weights; "wrong_detail" right topic but wrong date/port/plan.
MISS_KINDS = {"boilerplate": 18, "deflection": 20, "other_topic": 27, "on_topic": 27, "wrong_detail": 8}
# (name, Mbps, £ a month), cheapest first: an upgrade goes to a later plan, and fees and credits are
# worked out from the price.
PLANS = [("Meadow 80", 80, 24), ("Meadow 300", 300, 32), ("Meadow 500", 500, 38), ("Meadow 900", 900, 45)]
# Slots filled by one pick each, in this order (the seeded output depends on it).
REPLY_PICKS = "nth gport device hub fix day name".split()

REPLY_DATA = Phrases("reply_check.yaml")
REPLY_FILL = REPLY_DATA.table("slots", names=("town", "date", *REPLY_PICKS))
# Per topic: questions, replies that settle it, on-topic replies that do not, and the slots that a
# wrong-detail reply gets wrong (empty: that topic has no such variant).
TOPICS = {
    topic: {
        **REPLY_DATA.table("topics", topic, names=("q", "yes", "no")),
        "detail": REPLY_DATA.strings("topics", topic, "detail", empty_ok=True),
    }
    for topic in REPLY_DATA.get("topics")
}
BOILERPLATE = REPLY_DATA.strings("boilerplate")
DEFLECTIONS = REPLY_DATA.strings("deflections")
# Padding shared by good and bad replies, so politeness alone says nothing about the label.
REPLY_OPENERS = REPLY_DATA.strings("reply_openers")
REPLY_CLOSERS = REPLY_DATA.strings("reply_closers")
Q_OPENERS = REPLY_DATA.strings("question_openers")
Q_CONTEXT = REPLY_DATA.strings("question_context")


def reply_slots(rng: random.Random) -> dict[str, str]:
    """Fillers shared by a question and its reply, so a good reply can echo the question's specifics."""
    i = rng.randrange(len(PLANS) - 1)
    plan, speed, price = PLANS[i]
    up_plan, _, up_price = PLANS[rng.randrange(i + 1, len(PLANS))]
    town, town2 = rng.sample(REPLY_FILL["town"], 2)
    date, date2 = rng.sample(REPLY_FILL["date"], 2)
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
        "months": str(months),
        "fee": str(months * price),
        "days": str(days),
        "credit": f"{price * days / 30:.2f}",
        **{key: pick(rng, REPLY_FILL[key]) for key in REPLY_PICKS},
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


# ---------------------------------------------------------------- entry point

# Each task's data files are sample_tasks_data/<name>.yaml and <name>.README.template.md.
TASKS = [
    Task("ferry_messages", "fm", ["text"], FERRY_LABELS, FERRY_COUNTS, FERRY_NOISE, ferry_row),
    Task("reply_check", "rc", ["question", "reply"], REPLY_LABELS, REPLY_COUNTS, REPLY_NOISE, reply_pair),
]


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
    # str.format templates with labels, noise, flipped, table and keywords; all read before writing anything
    readmes = {task.name: read_data(f"{task.name}.README.template.md") for task in TASKS}
    for task in TASKS:
        name, labels, fields = task.name, task.labels, task.fields
        splits, flipped = make_task(task, rng)
        for split in SPLITS:
            write_csv(OUT / name / f"{split}.csv", ["id", *fields, "label"], splits[split])
        keywords = keyword_report(splits["train"], labels, fields)
        text = readmes[name].format(
            labels=", ".join(f"`{lab}`" for lab in labels),
            noise=task.noise,
            flipped=flipped,
            table=count_table(splits, labels),
            keywords=keywords,
        )
        (OUT / name / "README.md").write_text(text, encoding="utf-8")
        print(f"{name}: " + ", ".join(f"{s}={len(splits[s])}" for s in SPLITS) + f"; best keyword {keywords}")


if __name__ == "__main__":
    main()
