"""The invented scenario: a university "Tasting Lab" rates photos of plated dishes.

Everything here is made up: the lab, the dishes, the people, their contact
details and their consent. Names are drawn from an invented surname list and
contact details use ranges reserved for fiction (see `_phone`, `_email`).

Each participant has a latent taste vector over three dish attributes
(spiciness, plant-based, richness) plus a personal and a per-dish bias, so a
collaborative-filtering recommender has low-rank structure to learn.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field

import numpy as np

from vault.errors import UsageError

DEFAULT_SEED = 20260302
DEFAULT_PARTICIPANTS = 30
MIN_PARTICIPANTS = 24
MAX_PARTICIPANTS = 40

LAB_NAME = "Northfield University Sensory Lab"
LAB_NICKNAME = "Tasting Lab"
STUDY_TITLE = "How appealing are photos of plated dishes? (canteen menu recommender)"
STUDY_CODE = "NSL-2026-DISH"
EQUIPMENT_CODE = "NSL-AMP32-unit2"  # invented amplifier name

PURPOSES = (
    "primary-analysis",
    "recommender-training",
    "method-development",
    "external-sharing",
    "re-contact",
)
REFUSE_RECOMMENDER_FRACTION = 0.20
REFUSE_EXTERNAL_FRACTION = 0.15
REFUSE_METHOD_FRACTION = 0.10
RECONTACT_GRANT_PROBABILITY = 0.5
CONSENT_YEARS = 5
# The one expired consent ends after its session but before the reference date.
EXPIRED_CONSENT_DATE = dt.date(2026, 6, 1)
REFERENCE_DATE = dt.date(2026, 6, 15)
FIRST_SESSION_DAY = dt.date(2026, 3, 2)
LAST_SESSION_DAY = dt.date(2026, 5, 29)

SUBSECOND_STEP_US = 15_625  # 1/64 s
REPETITIONS = 2
RATING_MIN = 0
RATING_MAX = 3
RATING_NOISE_SD = 0.45

# Random streams: one per concern, so changing one does not reshuffle the others.
STREAM_DISHES = 1
STREAM_PEOPLE = 2
STREAM_CONSENT = 3
STREAM_EEG = 4


@dataclass(frozen=True)
class Dish:
    item_id: str
    name: str
    cuisine: str
    spiciness: int  # 0 mild .. 3 hot
    vegetarian: bool
    richness: int  # 0 light .. 2 rich


# (name, cuisine, spiciness, vegetarian, richness) -- invented menu.
_MENU: tuple[tuple[str, str, int, bool, int], ...] = (
    ("Roasted beetroot with goat cheese", "mediterranean", 0, True, 1),
    ("Miso-glazed aubergine with sesame", "east-asian", 0, True, 1),
    ("Chana masala with cumin rice", "south-asian", 2, True, 1),
    ("Beetroot-cured salmon on rye", "nordic", 0, False, 0),
    ("Black bean tacos with pickled onion", "latin-american", 1, True, 1),
    ("Falafel plate with tahini and pickles", "middle-eastern", 1, True, 1),
    ("Grilled sardines with lemon and fennel", "mediterranean", 0, False, 0),
    ("Mushroom mapo tofu with Sichuan pepper", "east-asian", 3, True, 1),
    ("Lamb rogan josh with naan", "south-asian", 2, False, 2),
    ("Meatballs with lingonberries and mash", "nordic", 0, False, 2),
    ("Chicken mole with sesame rice", "latin-american", 2, False, 2),
    ("Lamb kofta with flatbread and sumac onions", "middle-eastern", 1, False, 1),
    ("Slow-braised lamb shoulder with white beans", "mediterranean", 1, False, 2),
    ("Soy-braised pork belly with pak choi", "east-asian", 1, False, 2),
    ("Palak paneer with jeera rice", "south-asian", 1, True, 2),
    ("Barley porridge with mushrooms and dill", "nordic", 0, True, 1),
    ("Sea bass ceviche with lime and chilli", "latin-american", 2, False, 0),
    ("Baked eggs in spiced tomato with feta", "middle-eastern", 2, True, 1),
    ("Courgette and ricotta tart", "mediterranean", 0, True, 1),
    ("Cold soba noodles with cucumber and ginger", "east-asian", 0, True, 0),
    ("Tandoori-style chicken with mint yoghurt", "south-asian", 2, False, 1),
    ("Smoked mackerel with new potatoes", "nordic", 0, False, 1),
    ("Sweet potato and corn empanadas", "latin-american", 1, True, 2),
    ("Lentils and rice with crispy onions", "middle-eastern", 0, True, 1),
    ("Chickpea and spinach stew with smoked paprika", "mediterranean", 1, True, 1),
    ("Kimchi fried rice with a fried egg", "east-asian", 2, True, 1),
    ("Red lentil dal with tempered spices", "south-asian", 1, True, 1),
    ("Roasted root vegetables with horseradish cream", "nordic", 1, True, 1),
    ("Slow-cooked beef chilli with rice and sour cream", "latin-american", 3, False, 2),
    ("Chicken shawarma with garlic sauce", "middle-eastern", 1, False, 2),
    ("Seafood risotto with saffron", "mediterranean", 0, False, 2),
    ("Teriyaki salmon with pickled radish", "east-asian", 0, False, 1),
    ("Coconut fish curry with tamarind", "south-asian", 3, False, 2),
    ("Yellow pea soup with mustard and rye croutons", "nordic", 0, True, 1),
    ("Grilled corn with lime and crumbled cheese", "latin-american", 1, True, 1),
    ("Herb and bread salad with pomegranate", "middle-eastern", 0, True, 0),
    ("Tomato and bread salad with basil", "mediterranean", 0, True, 0),
    ("Sesame noodles with chilli oil and pork", "east-asian", 3, False, 2),
    ("Vegetable biryani with raita", "south-asian", 1, True, 1),
    ("Pan-fried cod with brown butter and capers", "nordic", 0, False, 2),
    ("Quinoa salad with avocado and lime", "latin-american", 0, True, 0),
    ("Roast cauliflower with tahini and pistachio", "middle-eastern", 0, True, 1),
    ("Chicken thighs with olives and preserved lemon", "mediterranean", 1, False, 1),
    ("Steamed vegetable dumplings with black vinegar", "east-asian", 1, True, 1),
    ("Rice pancake with potato masala and coconut chutney", "south-asian", 2, True, 1),
    ("Rye crispbread with egg and chive salad", "nordic", 0, True, 0),
    ("Pulled pork bowl with green salsa", "latin-american", 2, False, 2),
    ("Baked hake with herb and chilli paste", "middle-eastern", 2, False, 1),
    ("Baked aubergine with tomato and mozzarella", "mediterranean", 0, True, 2),
    ("Crispy chicken with fermented chilli glaze", "east-asian", 2, False, 2),
    ("Prawn curry with coconut cream", "south-asian", 1, False, 2),
    ("Venison stew with juniper", "nordic", 0, False, 2),
    ("Stuffed peppers with rice and cheese", "latin-american", 1, True, 1),
    ("Stuffed vine leaves with yoghurt", "middle-eastern", 0, True, 0),
    ("Chilli prawns with garlic and parsley", "mediterranean", 2, False, 1),
    ("Clear broth with tofu and shiitake", "east-asian", 0, True, 0),
    ("Cauliflower and pea pastries with tamarind dip", "south-asian", 1, True, 2),
    ("Cabbage and apple salad with toasted seeds", "nordic", 0, True, 0),
    ("Cheese and jalapeno corn cakes", "latin-american", 3, True, 2),
    ("Spiced lentil soup with lemon", "middle-eastern", 1, True, 0),
)

DISHES: tuple[Dish, ...] = tuple(
    Dish(f"dish-{i:02d}", *row) for i, row in enumerate(_MENU, start=1)
)

# (first name, sex as written in the EDF+ header)
_FIRST_NAMES: tuple[tuple[str, str], ...] = (
    ("Marta", "F"), ("Tomasz", "M"), ("Aiyana", "F"), ("Kofi", "M"), ("Ingrid", "F"),
    ("Ravi", "M"), ("Yuki", "F"), ("Leona", "F"), ("Mateo", "M"), ("Saoirse", "F"),
    ("Dmitri", "M"), ("Amara", "F"), ("Henrik", "M"), ("Lucia", "F"), ("Tariq", "M"),
    ("Noor", "F"), ("Elias", "M"), ("Priya", "F"), ("Oskar", "M"), ("Zanele", "F"),
    ("Felix", "M"), ("Mei", "F"), ("Rosalind", "F"), ("Idris", "M"), ("Nadia", "F"),
    ("Bastian", "M"), ("Ife", "F"), ("Clara", "F"), ("Emre", "M"), ("Sunniva", "F"),
    ("Joaquin", "M"), ("Wren", "F"), ("Anouk", "F"), ("Caspar", "M"), ("Lale", "F"),
    ("Teodor", "M"), ("Halima", "F"), ("Rune", "M"), ("Ottilie", "F"), ("Kwame", "M"),
)
# Invented surnames: plausible-sounding, chosen not to match public figures.
_SURNAMES: tuple[str, ...] = (
    "Ashcombe", "Brindlemoor", "Carrowby", "Dunmerrow", "Elsworthy", "Fenwright",
    "Galloran", "Haverleigh", "Illingmere", "Jorvane", "Kestrelby", "Larkwell",
    "Marrowfield", "Nettlecombe", "Orrinwade", "Pennimore", "Quillon", "Rookhaven",
    "Sallowby", "Thistlewood", "Umberlane", "Vantorre", "Wexmoor", "Yarrowby",
    "Zellicot", "Belcourt", "Corrandi", "Delmarre", "Eskerwood", "Farrowgate",
    "Grindell", "Hesketh-Marr", "Ivorsen", "Kilbraith", "Lowrandy", "Mirefield",
    "Ottersley", "Pellegrane", "Stavely-Rune", "Tollemarch",
)
# Invented technicians: (as written in notes, as written in the EDF+ header)
TECHNICIANS: tuple[tuple[str, str], ...] = (
    ("J. Okafor", "J.Okafor"),
    ("S. Lindgard", "S.Lindgard"),
    ("M. Ferreira-Lund", "M.Ferreira-Lund"),
)

# Free-text session notes of the kind technicians type; they name people, so the
# vault must scrub them. `{first}`, `{surname}`, `{tech}`, `{phone}` are filled in.
NOTE_TEMPLATES: tuple[str, ...] = (
    "participant {first} said they were tired",
    "tech: {tech} adjusted cap",
    "{first} {surname} asked for a short break",
    "note: {first} mentions a nut allergy",
    "call {first} back on {phone}",
    "Pz re-gelled by {tech}",
)


@dataclass(frozen=True)
class ConsentPlan:
    grants: dict[str, bool]
    signed: dt.date
    expires: dt.date


@dataclass(frozen=True)
class Participant:
    index: int
    lab_code: str
    first_name: str
    surname: str
    sex: str
    birthdate: dt.date
    patient_code: str  # hospital-style register number, written into the EDF+ header
    email: str
    phone: str
    technician: tuple[str, str]
    session_start: dt.datetime
    consent: ConsentPlan

    @property
    def full_name(self) -> str:
        return f"{self.first_name} {self.surname}"

    @property
    def edf_name(self) -> str:
        """EDF+ subfields may not contain spaces: they become underscores."""
        return self.full_name.replace(" ", "_")

    def notes(self, rng: np.random.Generator) -> list[str]:
        """One to three identifying free-text notes for this participant's recording."""
        count = int(rng.integers(1, 4))
        picks = rng.choice(len(NOTE_TEMPLATES), size=count, replace=False)
        return [
            NOTE_TEMPLATES[int(i)].format(
                first=self.first_name,
                surname=self.surname,
                tech=self.technician[0],
                phone=self.phone,
            )
            for i in sorted(picks)
        ]


@dataclass(frozen=True)
class Study:
    seed: int
    dishes: tuple[Dish, ...]
    participants: tuple[Participant, ...]
    latent: np.ndarray = field(repr=False)  # (participants, dishes), rating scale 0..3
    ratings: np.ndarray = field(repr=False)  # (participants, dishes), int 0..3


def rng_for(seed: int, *stream: int) -> np.random.Generator:
    """A reproducible generator for one concern (and optionally one participant)."""
    return np.random.default_rng([seed, *stream])


def refusal_count(n_participants: int, fraction: float) -> int:
    """Round half up, at least one: 30 participants x 15 % -> 5."""
    return max(1, math.floor(n_participants * fraction + 0.5))


def dish_factors(dishes: tuple[Dish, ...] = DISHES) -> np.ndarray:
    """(dishes, 3) z-scored attributes: spiciness, plant-based, richness."""
    raw = np.array(
        [[d.spiciness, 1.0 if d.vegetarian else 0.0, d.richness] for d in dishes], dtype=float
    )
    return (raw - raw.mean(axis=0)) / raw.std(axis=0)


def _weekdays(first: dt.date, last: dt.date) -> list[dt.date]:
    days = (first + dt.timedelta(days=i) for i in range((last - first).days + 1))
    return [d for d in days if d.weekday() < 5]


def _phone(k: int) -> str:
    # UK mobile numbers 07700 900000-900999 are reserved for drama (Ofcom; from memory).
    return f"+44 7700 900{k:03d}"


def _email(first: str, surname: str) -> str:
    # ".example" is reserved for documentation (RFC 2606), so no mail can ever arrive.
    return f"{first}.{surname}@mail.northfield.example".lower()


def _session_starts(rng: np.random.Generator, n: int) -> list[dt.datetime]:
    days = _weekdays(FIRST_SESSION_DAY, LAST_SESSION_DAY)
    chosen = sorted(rng.choice(len(days), size=n, replace=False))
    starts = []
    for i in chosen:
        hour = int(rng.integers(9, 17))
        minute = int(rng.choice([0, 15, 30, 45]))
        second = int(rng.integers(0, 60))
        # About a third of the sessions start on a sub-second. Multiples of 1/64 s are
        # exact in binary and in microseconds, so every EDF+ onset (start offset plus
        # sample time) stays a short exact decimal; strict readers reject float noise.
        micro = int(rng.integers(1, 64)) * SUBSECOND_STEP_US if rng.random() < 1 / 3 else 0
        starts.append(dt.datetime.combine(days[int(i)], dt.time(hour, minute, second, micro)))
    return starts


def _birthdate(rng: np.random.Generator) -> dt.date:
    first, last = dt.date(1961, 1, 1), dt.date(2006, 12, 31)
    return first + dt.timedelta(days=int(rng.integers(0, (last - first).days + 1)))


def _add_years(day: dt.date, years: int) -> dt.date:
    try:
        return day.replace(year=day.year + years)
    except ValueError:  # 29 February
        return day.replace(year=day.year + years, day=28)


def _consent_plans(seed: int, starts: list[dt.datetime]) -> list[ConsentPlan]:
    n = len(starts)
    rng = rng_for(seed, STREAM_CONSENT)
    no_recommender = set(rng.choice(n, refusal_count(n, REFUSE_RECOMMENDER_FRACTION), False))
    no_external = set(rng.choice(n, refusal_count(n, REFUSE_EXTERNAL_FRACTION), False))
    no_method = set(rng.choice(n, refusal_count(n, REFUSE_METHOD_FRACTION), False))
    expired = int(rng.integers(0, n))
    plans = []
    for i, start in enumerate(starts):
        grants = {
            "primary-analysis": True,
            "recommender-training": i not in no_recommender,
            "method-development": i not in no_method,
            "external-sharing": i not in no_external,
            "re-contact": bool(rng.random() < RECONTACT_GRANT_PROBABILITY),
        }
        signed = start.date() - dt.timedelta(days=int(rng.integers(0, 15)))
        expires = EXPIRED_CONSENT_DATE if i == expired else _add_years(signed, CONSENT_YEARS)
        plans.append(ConsentPlan(grants=grants, signed=signed, expires=expires))
    return plans


def _latent(seed: int, n: int) -> np.ndarray:
    """Low-rank preference on the 0..3 rating scale: biases plus taste . attributes."""
    factors = dish_factors()
    dish_bias = rng_for(seed, STREAM_DISHES).normal(0.0, 0.35, size=len(DISHES))
    rng = rng_for(seed, STREAM_PEOPLE, 1)
    taste = rng.normal(0.0, 0.5, size=(n, factors.shape[1]))
    person_bias = rng.normal(0.0, 0.3, size=n)
    return 1.5 + person_bias[:, None] + dish_bias[None, :] + taste @ factors.T


def _ratings(seed: int, latent: np.ndarray) -> np.ndarray:
    noise = rng_for(seed, STREAM_PEOPLE, 2).normal(0.0, RATING_NOISE_SD, size=latent.shape)
    return np.clip(np.rint(latent + noise), RATING_MIN, RATING_MAX).astype(np.int64)


def build_study(n_participants: int = DEFAULT_PARTICIPANTS, seed: int = DEFAULT_SEED) -> Study:
    """The whole invented cohort, deterministic in (n_participants, seed)."""
    if not MIN_PARTICIPANTS <= n_participants <= MAX_PARTICIPANTS:
        raise UsageError(
            f"n_participants must be between {MIN_PARTICIPANTS} and {MAX_PARTICIPANTS}"
        )
    if seed < 0:
        raise UsageError("seed must be a non-negative integer")
    n = n_participants
    rng = rng_for(seed, STREAM_PEOPLE, 0)
    firsts = rng.choice(len(_FIRST_NAMES), size=n, replace=False)
    surnames = rng.choice(len(_SURNAMES), size=n, replace=False)
    phones = rng.choice(1000, size=n, replace=False)
    codes = rng.choice(9_000_000, size=n, replace=False) + 1_000_000
    starts = _session_starts(rng, n)
    plans = _consent_plans(seed, starts)
    people = []
    for i in range(n):
        first, sex = _FIRST_NAMES[int(firsts[i])]
        surname = _SURNAMES[int(surnames[i])]
        people.append(
            Participant(
                index=i,
                lab_code=f"TL-{i + 1:03d}",
                first_name=first,
                surname=surname,
                sex=sex,
                birthdate=_birthdate(rng),
                patient_code=f"NUH-{int(codes[i])}",
                email=_email(first, surname),
                phone=_phone(int(phones[i])),
                technician=TECHNICIANS[int(rng.integers(0, len(TECHNICIANS)))],
                session_start=starts[i],
                consent=plans[i],
            )
        )
    latent = _latent(seed, n)
    return Study(
        seed=seed,
        dishes=DISHES,
        participants=tuple(people),
        latent=latent,
        ratings=_ratings(seed, latent),
    )
