"""The text demo: a help desk of a home-internet provider that routes messages to teams.

Every message is invented here, from templates and word lists of our own, with a seeded
generator. A router (scikit-learn's TF-IDF and logistic regression) is trained on clean
English messages written to one team each; the dev set is drawn the same way, with
failure modes planted on purpose:

* **second language** -- some customers write in Spanish; the router was trained on
  English only. No column records it (``channel``, ``plan`` and ``region`` do not).
* **forwarded threads** -- by e-mail, a customer forwards an old thread about something
  else and adds a short new request on top; recorded by ``channel`` = email, and by the
  text's shape (many lines, an address in a ``From:`` line).
* **SMS cut short** -- the SMS gateway keeps the first 40 characters of a message;
  recorded by ``channel`` = sms.
* **moving house** -- customers who move ask to stop the service at the old address and
  start it at the new one, which is the installation team's work; the router, which
  never saw such messages, reads "stop the service" as a cancellation. Recorded in no
  column; only the words show it.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from slicefind.demodata import Planted

__all__ = ["HelpDesk", "make_helpdesk", "TEAMS", "CHANNELS"]

TEAMS = ("billing", "outage", "installation", "account", "cancellation")
CHANNELS = ("email", "chat", "web form", "sms")
PLANS = ("basic", "plus", "fibre")
REGIONS = ("north", "south", "east", "west", "metro")
_SMS_LIMIT = 24

_FILL = {
    "amount": ["$12.40", "$38", "$74.99", "$5", "$120", "$19.95", "$61"],
    "month": ["March", "April", "May", "June", "July", "August", "September"],
    "device": ["router", "modem", "wifi box", "set-top box", "extender"],
    "light": ["red", "orange", "blinking", "flashing green", "off"],
    "day": ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday"],
    "street": ["Elm Street", "Harbour Road", "Mill Lane", "Station Avenue", "Oak Court", "Quarry Hill"],
    "competitor": ["another provider", "a cheaper offer", "a mobile plan", "my neighbour's network"],
    "hours": ["two hours", "since this morning", "all weekend", "three days", "since last night"],
}

_ENGLISH = {
    "billing": [
        "I was charged {amount} twice on my {month} bill, please refund the duplicate payment.",
        "My invoice for {month} shows {amount} more than my plan price. Can you explain the charge?",
        "The direct debit failed and now there is a late fee of {amount} on my account.",
        "Why did my monthly bill go up to {amount}? Nobody told me about a price change.",
        "I paid {amount} by card but the invoice still says the balance is unpaid.",
        "Please send me a copy of the {month} invoice and a receipt for the payment.",
        "There is a charge of {amount} for equipment rental that I never agreed to.",
        "Can I change the date my bill is paid? The {day} debit does not suit me.",
    ],
    "outage": [
        "The internet has been down for {hours} and the {device} light is {light}.",
        "No connection at all {hours}, I restarted the {device} twice and nothing works.",
        "Is there an outage in my area? Everything dropped {hours} and the light is {light}.",
        "The connection keeps dropping every few minutes, the {device} shows a {light} light.",
        "Very slow speeds {hours}, pages do not load and video calls freeze.",
        "Our whole street lost internet {hours}. When will the service be back?",
        "The {device} is on but there is no signal {hours}, the light stays {light}.",
        "Internet is down again, third time this week, the {device} light went {light}.",
    ],
    "installation": [
        "I want to book an engineer to install the {device} on {day}.",
        "The technician did not come for the installation appointment on {day}.",
        "Can you reschedule my installation visit to {day} morning?",
        "I ordered fibre and need the new {device} installed, what dates are free?",
        "The engineer installed the line but the {device} was never set up.",
        "Please send a technician to move the socket to another room on {day}.",
        "When will my new line be connected? The installation was booked for {day}.",
        "I need a second {device} installed upstairs, can someone visit on {day}?",
    ],
    "account": [
        "I forgot my password and cannot log in to my account.",
        "Please change the email address on my account and update my phone number.",
        "How do I add my partner as a second account holder?",
        "The login page says my account is locked after too many attempts.",
        "I want to update my contact details and my postal address for letters.",
        "Can you reset the security question on my online account?",
        "I cannot see my usage in the app after the last update, my login fails.",
        "Please add a new user to the account so my son can manage the {device}.",
    ],
    "cancellation": [
        "I want to cancel my contract at the end of {month}, I found {competitor}.",
        "Please end my service and tell me where to return the {device}.",
        "How much is the early termination fee if I cancel now? I am going to {competitor}.",
        "I would like to close my account and stop the service from {month}.",
        "Cancel my subscription please, the price is too high compared to {competitor}.",
        "I am leaving for {competitor}; confirm the cancellation date in writing.",
        "Stop my plan at the end of the month and send the return label for the {device}.",
        "I no longer need the service, please terminate the contract in {month}.",
    ],
}

_SPANISH = {
    "billing": [
        "Me cobraron {amount} dos veces en la factura de {month}, quiero un reembolso.",
        "La factura de este mes es de {amount}, más de lo que pago normalmente. ¿Por qué?",
        "Pagué {amount} con tarjeta pero la factura sigue pendiente de pago.",
    ],
    "outage": [
        "No tengo internet desde hace {hours} y la luz del {device} está {light}.",
        "La conexión se corta cada pocos minutos, ya reinicié el {device} dos veces.",
        "¿Hay una avería en mi zona? Todo dejó de funcionar {hours}.",
    ],
    "installation": [
        "Quiero reservar un técnico para instalar el {device} el {day}.",
        "El técnico no vino a la cita de instalación del {day}.",
        "¿Pueden cambiar la visita de instalación al {day} por la mañana?",
    ],
    "account": [
        "Olvidé mi contraseña y no puedo entrar en mi cuenta.",
        "Por favor cambien el correo electrónico y el teléfono de mi cuenta.",
        "Mi cuenta está bloqueada después de varios intentos de acceso.",
    ],
    "cancellation": [
        "Quiero darme de baja a finales de {month}, encontré {competitor}.",
        "Por favor terminen mi contrato y díganme dónde devolver el {device}.",
        "¿Cuánto cuesta la penalización si cancelo ahora el contrato?",
    ],
}
_SPANISH_FILL = {
    "month": ["marzo", "abril", "mayo", "junio", "julio", "agosto"],
    "device": ["router", "módem", "decodificador", "repetidor"],
    "light": ["roja", "naranja", "apagada", "parpadeando"],
    "day": ["lunes", "martes", "miércoles", "jueves", "viernes", "sábado"],
    "hours": ["dos horas", "esta mañana", "todo el fin de semana", "tres días"],
    "competitor": ["otra compañía", "una oferta más barata", "otro operador"],
}

_MOVING = [
    "We are moving house on {day}. Please stop the service at {street} and start it at our new home.",
    "I am moving to {street} next month; end the line at my old address and connect the new one.",
    "Moving out of {street} on {day}, can you stop my internet there and set it up at the new flat?",
    "We move on {day}: please disconnect the old address and install the service at {street}.",
    "New address from {month}: {street}. Stop the service at the current one and move my plan over.",
]

_GREETINGS = ["", "", "Hi, ", "Hello, ", "Good morning, ", "Dear support, ", "Hi team, "]
_SIGNOFFS = ["", "", " Thanks.", " Thank you!", " Regards, {Name}", " Cheers", " Please help.",
             " Thanks in advance, {Name}"]
_CONTEXT = [
    "My account number is {acct}.", "I have been a customer for {years} years.",
    "This is the second time I write about this.", "I tried calling but nobody answered.",
    "My name is {Name}.", "Please call me back on {phone}.", "It is quite urgent.",
    "I am at home all day.", "The contract is in my partner's name.", "I use the app mostly.",
    "Reference {acct}.", "I work from home so this matters.",
]
_SPANISH_CONTEXT = ["Mi número de cliente es {acct}.", "Gracias.", "Es urgente.", "Soy {Name}.",
                    "Llámenme al {phone}.", "Un saludo."]
_NAMES = ["alex", "jordan", "sam", "maria", "lee", "chris", "pat", "robin", "dana", "kim"]


@dataclass(frozen=True, repr=False)
class HelpDesk:
    """The text demo's dev set (`make_helpdesk`).

    Attributes
    ----------
    frame : DataFrame
        One row per message: ``ticket_id, channel, plan, region, account_months,
        received_at, message, team`` (the true team) and ``routed`` (the router's team).
    planted : dict
        Failure mode -> `slicefind.demodata.Planted`.
    """

    frame: pd.DataFrame
    planted: Mapping[str, Planted] = field(default_factory=dict)

    @property
    def error_rate(self) -> float:
        """Share of messages the router sends to the wrong team."""
        return float((self.frame["team"] != self.frame["routed"]).mean())

    def __repr__(self):
        return f"HelpDesk(n_rows={len(self.frame)}, n_planted={len(self.planted)})"


def _fill(template: str, rng, fill: Mapping[str, list]) -> str:
    out = template
    for key, options in fill.items():
        token = "{" + key + "}"
        while token in out:
            out = out.replace(token, options[rng.integers(len(options))], 1)
    for token, make in (("{acct}", lambda: f"{rng.integers(10**7, 10**8)}"),
                        ("{phone}", lambda: f"07{rng.integers(10**8, 10**9)}"),
                        ("{years}", lambda: str(rng.integers(1, 16))),
                        ("{Name}", lambda: _NAMES[rng.integers(len(_NAMES))].title())):
        while token in out:
            out = out.replace(token, make(), 1)
    return out


def _typos(text: str, rng, rate: float = 0.03) -> str:
    """Swap two letters in a few words, as people type."""
    words = text.split(" ")
    for i in np.flatnonzero(rng.random(len(words)) < rate):
        w = words[i]
        if len(w) > 3:
            j = int(rng.integers(1, len(w) - 2))
            words[i] = w[:j] + w[j + 1] + w[j] + w[j + 2:]
    return " ".join(words)


def _message(team: str, rng, *, templates=_ENGLISH, fill=_FILL, context=_CONTEXT, polite: bool = True,
             core=None) -> str:
    if core is None:
        options = templates[team]
        core = options[rng.integers(len(options))]
    parts = [_fill(core, rng, fill)]
    for _ in range(rng.choice(3, p=[0.45, 0.4, 0.15])):
        extra = _fill(context[rng.integers(len(context))], rng, fill)
        parts.insert(int(rng.integers(0, len(parts) + 1)), extra)
    body = " ".join(parts)
    if polite:
        greeting = _GREETINGS[rng.integers(len(_GREETINGS))]
        if greeting and not body.startswith("I "):
            body = body[0].lower() + body[1:]
        body = greeting + body + _fill(_SIGNOFFS[rng.integers(len(_SIGNOFFS))], rng, fill)
    return _typos(body, rng)


def _forwarded(team: str, rng) -> str:
    """A short new request on top of an old thread about another team's matter."""
    other = [t for t in TEAMS if t != team][rng.integers(len(TEAMS) - 1)]
    name = _NAMES[rng.integers(len(_NAMES))]
    old = " ".join(_message(other, rng, polite=False) for _ in range(2))
    new = _message(team, rng, polite=False)
    new = new.split(". ")[0].split(", ")[0].rstrip(".") + "."
    return (f"{new}\n\n---------- Forwarded message ----------\nFrom: {name} <{name}@mailbox.example>\n"
            f"Subject: Re: my account\n\n> {old}\n> Regards, {name.title()}")


def _router(rng, n_train: int = 3000):
    """TF-IDF + logistic regression trained on clean English messages, one team each."""
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline

    teams = np.array(TEAMS, dtype=object)[rng.integers(len(TEAMS), size=n_train)]
    texts = [_message(t, rng) for t in teams]
    model = make_pipeline(TfidfVectorizer(sublinear_tf=True, min_df=2),
                          LogisticRegression(C=4.0, max_iter=300))
    return model.fit(texts, teams)


def make_helpdesk(n_rows: int = 5000, *, random_state=0, spanish_share: float = 0.05,
                  moving_share: float = 0.04, forwarded_share: float = 0.12,
                  label_noise: float = 0.04) -> HelpDesk:
    """Build the help-desk text demo.

    Parameters
    ----------
    n_rows : int, default=5000
        Messages in the dev set, at least 200.
    random_state : int, Generator or None, default=0
        Seeds everything; the same seed gives the same frame.
    spanish_share, moving_share : float
        Shares of messages written in Spanish and about moving house (recorded in no column).
    forwarded_share : float, default=0.12
        Share of e-mails that forward an old thread.
    label_noise : float, default=0.04
        Share of rows whose true team was keyed wrong (scattered errors with no pattern).

    Returns
    -------
    HelpDesk

    Examples
    --------
    >>> desk = make_helpdesk(1000, random_state=0)
    >>> desk
    HelpDesk(n_rows=1000, n_planted=4)
    >>> sorted(name for name, p in desk.planted.items() if not p.recorded)
    ['moving house', 'second language']
    """
    if isinstance(n_rows, bool) or not isinstance(n_rows, (int, np.integer)) or n_rows < 200:
        raise ValueError(f"n_rows must be an integer >= 200; got {n_rows!r}.")
    for name, value in (("spanish_share", spanish_share), ("moving_share", moving_share),
                        ("forwarded_share", forwarded_share), ("label_noise", label_noise)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 0.5:
            raise ValueError(f"{name} must be a number in [0, 0.5]; got {value!r}.")
    rng = np.random.default_rng(random_state)
    router = _router(rng)
    n = int(n_rows)
    channel = rng.choice(np.array(CHANNELS, dtype=object), n, p=[0.4, 0.3, 0.2, 0.1])
    plan = rng.choice(np.array(PLANS, dtype=object), n, p=[0.45, 0.35, 0.2])
    region = rng.choice(np.array(REGIONS, dtype=object), n)
    months = rng.integers(1, 120, n)
    start = np.datetime64("2025-02-03T00:00")
    received = pd.to_datetime(start + np.sort(rng.integers(0, 28 * 24 * 60, n)).astype("timedelta64[m]"))
    team = rng.choice(np.array(TEAMS, dtype=object), n, p=[0.26, 0.24, 0.18, 0.17, 0.15])
    mode = rng.random(n)
    spanish = mode < spanish_share
    moving = (mode >= spanish_share) & (mode < spanish_share + moving_share)
    team[moving] = "installation"
    forwarded = ~spanish & ~moving & (channel == "email") & (rng.random(n) < forwarded_share)
    messages = np.empty(n, dtype=object)
    for i in range(n):
        if spanish[i]:
            messages[i] = _message(team[i], rng, templates=_SPANISH, fill=_SPANISH_FILL,
                                   context=_SPANISH_CONTEXT, polite=False)
        elif moving[i]:
            messages[i] = _message(team[i], rng, core=_MOVING[rng.integers(len(_MOVING))])
        elif forwarded[i]:
            messages[i] = _forwarded(team[i], rng)
        else:
            messages[i] = _message(team[i], rng)
    sms = channel == "sms"
    cut = sms & np.array([len(m) > _SMS_LIMIT for m in messages])
    messages[cut] = [m[:_SMS_LIMIT] for m in messages[cut]]
    routed = router.predict(list(messages))
    # the dev set's own labels: a few were keyed to a random other team by the person triaging
    slip = rng.random(n) < label_noise
    team[slip] = [[t for t in TEAMS if t != given][rng.integers(len(TEAMS) - 1)] for given in team[slip]]
    frame = pd.DataFrame({
        "ticket_id": [f"T{200_000 + i}" for i in range(n)],
        "channel": pd.Categorical(channel, categories=CHANNELS),
        "plan": pd.Categorical(plan, categories=PLANS),
        "region": pd.Categorical(region, categories=REGIONS),
        "account_months": months,
        "received_at": received,
        "message": messages,
        "team": team,
        "routed": routed,
    })
    planted = {
        "second language": Planted("second language", np.flatnonzero(spanish).astype(np.intp), (),
                                   "written in Spanish; the router knows English only"),
        "forwarded thread": Planted("forwarded thread", np.flatnonzero(forwarded).astype(np.intp),
                                    ("channel",), "an old thread about another matter under a short request"),
        "sms cut short": Planted("sms cut short", np.flatnonzero(cut).astype(np.intp), ("channel",),
                                 f"the SMS gateway keeps the first {_SMS_LIMIT} characters"),
        "moving house": Planted("moving house", np.flatnonzero(moving).astype(np.intp), (),
                                "stop at the old address, start at the new: installation, read as cancellation"),
    }
    return HelpDesk(frame=frame, planted=planted)
