"""Generate the demo data set: support tickets for the invented provider "Brightwater Utilities".

Everything is made up: the company, streets, towns, plans, e-mail domains (.test /
.example) and phone numbers (the 07700 900xxx range reserved for fiction).
Deterministic (one seeded ``random.Random``), standard library only, no network.
Writes ``support_tickets.csv`` (columns ``text,queue``) next to itself::

    python recipes/data/make_demo_data.py

Learnable but not trivial, so a fine-tuned classifier lands well below 100 %:
imbalanced queues, vocabulary shared across queues, messages with two requests
(routed on the first), a few genuinely ambiguous ones, content-free follow-ups
("any update?") and typing noise.
"""
import argparse
import collections
import csv
import re
import random
from pathlib import Path

SEED = 20240607
N_ROWS = 2000
OUT = Path(__file__).resolve().parent / "support_tickets.csv"

# Target class shares (imbalanced on purpose, like a real desk).
SHARES = {"billing": 0.26, "outage": 0.22, "installation": 0.16,
          "account_access": 0.14, "moving_home": 0.12, "cancellation": 0.10}

# ---------------------------------------------------------------- slot fillers
# Each {slot} in a template is replaced independently, so one template yields many texts.
STREETS = ["Alderbrook Lane", "Quillfeather Road", "Tansy Close", "Marrowgate Street",
           "Halloway Crescent", "Brindle Row", "Cobbler's Walk", "Fennick Avenue",
           "Larchmere Drive", "Oswin Terrace", "Pipers Mead", "Wrenhollow Court"]
TOWNS = ["Fernhollow", "Cinderwick", "Pellbridge", "Tamsby Green", "Orlanford",
         "Wrenmarsh", "Upper Harrowdene", "Lowen Cross"]
PLANS = ["Brightwater Fibre 150", "Fibre 500", "Brightwater Stream 300", "Home Essentials Energy",
         "Flexi Green tariff", "Fixed Saver 24", "Broadband Basic", "Dual Fuel Plus"]
DEVICES = ["router", "smart meter", "fibre box", "wifi extender", "in-home display",
           "prepayment meter", "hub", "EV charger"]
MONTHS = "January February March April May June July August September October November December".split()
DAYS = "Monday Tuesday Wednesday Thursday Friday Saturday Sunday".split()
EMAIL_DOMAINS = ["mailbox.test", "postmail.example", "inbox.example"]


def ordinal(n):
    return f"{n}{'th' if 10 <= n % 100 <= 20 else {1: 'st', 2: 'nd', 3: 'rd'}.get(n % 10, 'th')}"


SLOTS = {
    "street": lambda r: f"{r.randint(1, 140)} {r.choice(STREETS)}",
    "town": lambda r: r.choice(TOWNS),
    "plan": lambda r: r.choice(PLANS),
    "device": lambda r: r.choice(DEVICES),
    "amount": lambda r: r.choice([f"£{r.randint(9, 480)}.{r.randint(0, 99):02d}",
                                  f"£{r.randint(20, 300)}", f"{r.randint(30, 250)} pounds"]),
    "month": lambda r: r.choice(MONTHS),
    "day": lambda r: r.choice(DAYS),
    "date": lambda r: r.choice([f"{ordinal(r.randint(1, 28))} {r.choice(MONTHS)}",
                                f"{r.randint(1, 28)}/{r.randint(1, 12)}",
                                f"next {r.choice(DAYS)}", f"the {ordinal(r.randint(1, 28))}"]),
    "time": lambda r: r.choice([f"{r.randint(1, 11)}{r.choice(['am', 'pm'])}",
                                f"about {r.randint(1, 11)} o'clock", "lunchtime",
                                "last night", "this morning"]),
    "nth": lambda r: ordinal(r.randint(1, 28)),
    "clock": lambda r: r.choice([f"{r.randint(5, 11)}pm", f"{r.randint(5, 10)}.30", "teatime"]),
    "digits": lambda r: f"{r.randint(0, 999):03d}",
    "initials": lambda r: f"{r.choice('ABCDEFGHJKLMNPRSTW')}.{r.choice('ABCDEFGHJKLMNPRSTW')}.",
    "n": lambda r: r.choice(["two", "three", "4", "five", "6", "ten"]),
    "order": lambda r: f"{r.choice(['BW', 'ORD-', '#'])}{r.randint(100000, 999999)}",
    "ticket": lambda r: f"{r.choice(['TK-', '#', 'ref '])}{r.randint(10000, 99999)}",
    "acct": lambda r: f"{r.randint(10, 99)}{r.randint(100000, 999999)}",
    "email": lambda r: f"{r.choice(['home', 'mail', 'user', 'family'])}{r.randint(1, 999)}@{r.choice(EMAIL_DOMAINS)}",
}


def fill(template, r):
    return re.sub(r"\{(\w+)\}", lambda m: SLOTS[m.group(1)](r), template)


# ---------------------------------------------------------------- queue templates
# BODY: one-sentence statements of the actual request (the signal).
# Several deliberately borrow other queues' words (bill, router, engineer, outage...)
# so that a bag of words alone is not enough.
BODY = {
    "billing": [
        "I was charged {amount} this month but my plan is only {amount}.",
        "Why has my bill gone up to {amount}? Nobody told me about a price change.",
        "I've been charged twice for {month}, please refund one of the payments.",
        "The direct debit came out on {date} but I already paid by card.",
        "Can you explain the {amount} late payment fee on my latest invoice?",
        "My bill says I used way more electricity than normal, the smart meter reading must be wrong.",
        "I want to change my payment date to the {nth} of each month.",
        "Still waiting on the refund of {amount} you promised on {ticket}.",
        "There's a charge for a {device} on my bill but I sent it back weeks ago.",
        "Can I get a copy of my invoice for {month}? I need it for my expenses.",
        "You billed me for {plan} but I'm on the cheaper plan.",
        "My estimated bill is {amount}, can you use an actual meter reading instead?",
        "I was promised {amount} compensation for the outage and it isn't on my bill.",
        "Why am I paying a {amount} installation fee? The engineer visit was supposed to be free.",
        "The payment failed and now there's an extra {amount} charge, my card is fine.",
        "I'd like to set up a payment plan, I can't pay {amount} in one go.",
        "The credit on my account vanished after the last statement.",
        "Please switch me to paperless billing and stop the letters.",
        "Top up on the prepayment meter took {amount} but only showed half.",
        "The internet was down for {n} days in {month}, I want that taken off my bill.",
        "Since the new router was installed my direct debit went up by {amount}.",
    ],
    "outage": [
        "My internet has been down since {time}.",
        "The {device} lights are flashing red and there's no connection at all.",
        "Power cut on {street}, the whole street is dark, any ETA?",
        "Wifi keeps dropping every few minutes, it's unusable.",
        "Speeds are awful tonight, I'm getting under 2 Mbps on {plan}.",
        "No broadband anywhere in {town} since {time}, is there a known fault?",
        "I've restarted the {device} {n} times and still nothing.",
        "The electricity keeps tripping, is there a problem in the area?",
        "The internet goes off every evening around {clock}.",
        "Is there an outage? Your status page says all fine but my connection is dead.",
        "The prepayment meter shows supply off even though I have credit on it.",
        "The phone line crackles and then the broadband disconnects.",
        "Connection drops whenever it rains, that's {n} times this month.",
        "{ticket} about the fault is still open and I still have no service.",
        "Upload speed is basically zero, I can't join video calls for work.",
        "The lights flickered and then the power went off, neighbours too.",
        "No gas or electric since {day}, the smart meter display is blank.",
        "Since {day} the connection is down more than it's up.",
        "My bill is paid and my account is fine, so why has the broadband stopped?",
        "The engineer came to install it on {date} and it worked, now nothing since {time}.",
    ],
    "installation": [
        "When is the engineer coming to install {plan}? Order {order}.",
        "The engineer didn't turn up for the appointment on {date}.",
        "I'd like to book an installation slot for the new fibre line.",
        "My new {device} arrived but there are no instructions for setting it up.",
        "Can I move my installation from {date} to the week after?",
        "The installer drilled through the wrong wall and left cables everywhere.",
        "Order {order} says dispatched but the {device} never arrived.",
        "I need a smart meter fitted, how do I arrange that?",
        "What's the time window for the install on {date}? I have to take the day off.",
        "The engineer said the duct is blocked and he'd come back, nobody has called.",
        "Do I need to be at home for the fibre activation on {date}?",
        "The {device} was fitted but never activated, the light is solid orange.",
        "Can the EV charger be mounted on the side of the garage?",
        "I ordered {plan} {n} weeks ago and still have no installation date.",
        "The installer left without connecting the {device}, said the job was done.",
        "Is there a fee for fitting a second wifi extender?",
        "I want to upgrade to {plan}, does that need a new engineer visit?",
        "Tracking for order {order} hasn't updated since {date}, where's my kit?",
        "I'm paying {amount} a month already and the engineer still hasn't fitted the {device}.",
        "Before I give up and cancel, when is someone coming to connect the fibre?",
    ],
    "account_access": [
        "I can't log in to my account, it keeps saying my password is wrong.",
        "The password reset email never arrives at {email}.",
        "My account got locked after too many attempts.",
        "The app logs me out every time I open it.",
        "I don't get the verification code by text any more since I changed number.",
        "How do I add my partner as an authorised person on the account?",
        "Someone changed the email address on my account, it wasn't me!",
        "I can't see my bills in the online portal since the update.",
        "The two-factor code says expired every single time.",
        "I forgot my username, my account number is {acct}.",
        "Please update the login email on my account, the old one was {email}.",
        "Registering online says account not found for account number {acct}.",
        "The sign in page just spins and never loads.",
        "I got an email saying my password was changed, was that you?",
        "I can't link the smart meter to the app, it says the account doesn't match.",
        "The security questions on my account are wrong and I can't get past them.",
        "My {email} login stopped working after I reset it on {date}.",
        "I want to pay my bill online but the login won't accept my details.",
        "I moved house and now the app says my account details are invalid.",
    ],
    "moving_home": [
        "I'm moving to {street}, {town} on {date}, how do I transfer my services?",
        "We're moving house in {month}, can I take {plan} with me?",
        "I've moved out of {street}, please take a final meter reading.",
        "Moving into a new flat on {date} and need the electricity put in my name there.",
        "Can I keep {plan} when I move to {town}?",
        "Please close the supply at my old address and open one at the new one.",
        "What should I do with the {device} when I move out?",
        "New tenants moved into my old place and I'm still getting their bill.",
        "Change of address please, I now live at {street}.",
        "Is fibre available at {street}? We're moving there in {month}.",
        "I'm moving in with my partner who is already a customer, can we merge accounts?",
        "Send the final bill for the old property to my new address please.",
        "We move out on {date}, is there a fee if the new place can't get fibre?",
        "The landlord says the meter at my old house is still in my name, I left in {month}.",
        "Please move my broadband to my new address from {date}.",
        "Buying a house in {town}, completion is {date}, what do you need from me?",
        "My broadband at {street} ends when I move out on {date}, please set it up at the new place.",
        "I don't want to cancel, I just want to take the account with me to {town}.",
    ],
    "cancellation": [
        "I want to cancel my contract.",
        "Please cancel {plan}, I've found a cheaper deal elsewhere.",
        "How much is the early termination fee if I leave now?",
        "After the {n} outages this month I'm done, cancel everything.",
        "Cancel my account, the customer service has been awful.",
        "I'm still in the cooling-off period and want to cancel order {order}.",
        "Your price rise is ridiculous, I'm leaving at the end of my term.",
        "Send me a returns label for the {device}, I've cancelled.",
        "How do I end my energy supply with you? I'm switching supplier.",
        "Stop my contract renewing automatically.",
        "My contract ends on {date} and I don't want to renew.",
        "Please confirm the cancellation I asked for on {date} went through, {ticket}.",
        "I don't need the broadband any more, please close it.",
        "Cancel the EV charger add-on from my bill.",
        "What's the notice period to leave?",
        "End my service, you've billed me wrong for {n} months running.",
        "I'd like to terminate {plan} before the {date}.",
        "I'm moving in with family so I need to close my account, not transfer it.",
        "The router has been faulty for months, just close the account and send me the final bill.",
    ],
}

# Very short messages (3-6 words), typed in a hurry.
SHORT = {
    "billing": ["bill too high again", "double charged pls fix", "refund still not received",
                "why is my bill {amount}", "wrong amount on my invoice", "direct debit taken twice"],
    "outage": ["internet down again", "no wifi since {time}", "power cut on {street}",
               "broadband not working", "red light on {device}", "connection keeps dropping"],
    "installation": ["engineer never showed up", "when is my install", "need install date pls",
                     "{device} not arrived yet", "book smart meter install"],
    "account_access": ["cant log in", "password reset not working", "account locked again",
                       "no verification code", "app wont let me login"],
    "moving_home": ["moving house next month", "change of address pls", "final meter reading please",
                    "moving out on {date}", "transfer broadband to new address"],
    "cancellation": ["cancel my contract", "i want to leave", "close my account pls",
                     "how do i cancel", "end my contract now"],
}

# Genuinely ambiguous messages: either queue is a defensible label, so we pick one at random.
AMBIGUOUS = [
    (("moving_home", "cancellation"), "Moving abroad on {date}, please stop everything at {street}."),
    (("billing", "cancellation"), "I was charged {amount} after I cancelled, sort it out."),
    (("outage", "installation"), "Internet hasn't worked since the engineer came on {date}."),
    (("account_access", "billing"), "Can't log in to see my bill, how much do I owe?"),
    (("moving_home", "installation"), "Just moved into {street}, need someone to connect the fibre."),
    (("billing", "outage"), "No service for {n} days and you still charged me in full."),
    (("cancellation", "outage"), "If the internet isn't fixed by {day} I'm cancelling."),
    (("account_access", "cancellation"), "I can't log in to cancel online so please cancel it for me."),
    (("moving_home", "billing"), "Still being billed for my old address at {street}."),
    (("installation", "billing"), "The engineer visit cost {amount}? Nobody said it wasn't free."),
    (("account_access", "moving_home"), "I moved and now the app won't accept my new postcode."),
    (("installation", "outage"), "The new {device} you sent doesn't connect to anything."),
    (("outage", "billing"), "Why should I pay {amount} for a service that doesn't work?"),
    (("installation", "moving_home"), "Need the {device} set up at the new house on {date}."),
    (("cancellation", "billing"), "Price went up to {amount}, either fix it or I'm off."),
    (("account_access", "cancellation"), "Please close my online account."),
    (("outage", "installation"), "router problem"),
    (("billing", "outage"), "meter issue again"),
    (("billing", "account_access"), "question about my acct"),
]

# Follow-ups with no content: routed to the queue of the original ticket, so the
# text alone cannot tell you the queue. They cap achievable accuracy, as on a real desk.
VAGUE = [
    "Any update on {ticket}?", "I emailed last week and heard nothing back.",
    "Can someone call me back on 07700 900{digits}?", "Still not sorted.",
    "Following up on my previous message.", "Please reply, this is the third time I've written.",
    "Is anyone actually reading these?", "Re: {ticket}", "I need to speak to a manager.",
    "Same problem as before, see {ticket}.", "Nobody has got back to me about this.",
    "hello?? any news", "Your chat bot was no help at all.",
]

# Context sentences that add cross-queue vocabulary without changing the request.
ASIDES = [
    "I'm on {plan} by the way.", "My account number is {acct}.",
    "The router is the one you sent last year.", "I moved here in {month}.",
    "I've been with you {n} years and never complained before.",
    "I'm seriously thinking about cancelling if this isn't sorted.",
    "This is on top of the outage we had last week.",
    "I already paid my bill so that's not the problem.",
    "I tried logging in to check but the app is useless.",
    "The engineer who installed it was lovely though.",
    "My bill is paid by direct debit.", "The smart meter is in the hallway cupboard.",
    "I rang on {day} and got cut off after 40 minutes.",
    "Previous ticket was {ticket}.", "I work from home so this matters.",
    "We're moving in {month} anyway.", "I'm not very good with computers.",
    "Last month the internet was down for days.", "I only just had the router installed.",
    "I had trouble logging in to the app as well.", "Our bill went up again too.",
    "We're moving soon so a quick answer would help.", "The engineer is booked for {date}.",
]
SECONDARY = ["Also,", "And while I'm at it,", "Separately,", "Oh and", "Less urgent but", "PS"]
GREETINGS = ["Hi,", "Hello,", "Hi there,", "Dear Brightwater,", "Good morning,", "hey",
             "To whom it may concern,", "Hello Brightwater team,", "Evening,"]
MOODS = ["Please help.", "This is ridiculous.", "Thanks in advance.", "Really not happy.",
         "Sort it out!!!", "Any help appreciated.", "Getting fed up now.", "Urgent please.",
         "Appreciate it."]
SIGNOFFS = ["Thanks", "thx", "Regards, {initials}", "Cheers", "Kind regards", "Sent from my phone",
            "Many thanks, {initials}", "Ta"]

# Abbreviations people actually type.
ABBREV = {"please": "pls", "account": "acct", "thanks": "thx", "because": "cos", "you": "u",
          "your": "ur", "internet": "net", "tomorrow": "tmrw", "message": "msg", "number": "no."}


# ---------------------------------------------------------------- composing a message
def compose(queue, r):
    """Return (text, label). Most of the randomness in the data lives here."""
    kind = r.random()  # 6 % vague, 5 % ambiguous, 12 % short, 6 % long, 71 % typical
    if kind < 0.06:  # content-free follow-up, maybe with pleasantries around it
        return join_parts([fill(r.choice(VAGUE), r)], r, greet=0.4, sign=0.4), queue
    if kind < 0.11:  # ambiguous: pick a template whose pair includes this queue
        options = [(pair, t) for pair, t in AMBIGUOUS if queue in pair]
        pair, t = r.choice(options)
        return fill(t, r), r.choice(pair)
    if kind < 0.23:  # short and terse
        return fill(r.choice(SHORT[queue]), r), queue
    if kind < 0.29:  # long, rambling: several bodies plus several asides (~80-150 words)
        parts = r.sample(BODY[queue], 3) + r.sample(ASIDES, 4)
        r.shuffle(parts)
        parts.insert(0, r.choice(BODY[queue]))  # lead with the request
        parts += [r.choice(MOODS)]
        parts = [fill(p, r) for p in dict.fromkeys(parts)]  # drop a repeated sentence
        return join_parts(parts, r, greet=0.8, sign=0.8), queue
    # typical: one body, maybe a second, maybe an aside, maybe mood
    parts = [r.choice(BODY[queue])]
    if r.random() < 0.11:
        # Two requests in one message: the desk routes on the first (main) one, so word
        # counts alone are not enough here but word order is.
        other = r.choice([q for q in BODY if q != queue])
        second = fill(r.choice(BODY[other]), r)
        parts.append(r.choice(SECONDARY) + " " + second[0].lower() + second[1:])
    elif r.random() < 0.3:
        parts.append(r.choice(BODY[queue]))
    if r.random() < 0.5:
        parts.insert(r.randint(0, len(parts)), r.choice(ASIDES))
    if r.random() < 0.35:
        parts.append(r.choice(MOODS))
    parts = [fill(p, r) for p in dict.fromkeys(parts)]  # drop repeated sentence
    return join_parts(parts, r, greet=0.45, sign=0.4), queue


def join_parts(parts, r, greet, sign):
    # Run-on sentences: some people glue everything with "and" / commas.
    if len(parts) > 1 and r.random() < 0.15:
        glue = r.choice([" and ", ", ", " also "])
        body = glue.join(p.rstrip(".!?") for p in parts) + "."
    else:
        body = " ".join(parts)
    if r.random() < greet:
        body = r.choice(GREETINGS) + " " + body
    if r.random() < sign:
        body += " " + fill(r.choice(SIGNOFFS), r)
    return body


# ---------------------------------------------------------------- noise
def typo(word, r):
    i = r.randrange(len(word) - 1)
    if r.random() < 0.5:  # swap two neighbours
        return word[:i] + word[i + 1] + word[i] + word[i + 2:]
    return word[:i] + word[i + 1:]  # drop one character


def add_noise(text, r):
    if r.random() < 0.2:  # abbreviation-happy writer
        text = re.sub(r"\b(\w+)\b", lambda m: ABBREV.get(m.group(1).lower(), m.group(1))
                      if r.random() < 0.7 else m.group(1), text)
    words = text.split(" ")
    words = [typo(w, r) if len(w) >= 4 and w.isalpha() and r.random() < 0.05 else w for w in words]
    text = " ".join(words)
    style = r.random()
    if style < 0.15:  # lowercase, no punctuation
        text = re.sub(r"[.,!?;:']", "", text.lower())
    elif style < 0.19:  # SHOUTING
        text = text.upper()
    return re.sub(r"\s+", " ", text).strip()


# ---------------------------------------------------------------- main
def generate(n_rows, seed):
    r = random.Random(seed)
    queues = list(SHARES)
    counts = {q: round(n_rows * s) for q, s in SHARES.items()}
    counts[queues[0]] += n_rows - sum(counts.values())  # absorb rounding
    # Generate per target queue; the label may differ only for ambiguous messages.
    # Unique texts first, then ~1.5 % exact duplicates on purpose.
    rows, seen = [], set()
    for q in queues:
        n_unique = counts[q] - round(counts[q] * 0.015)
        made = 0
        while made < n_unique:
            text, label = compose(q, r)
            text = add_noise(text, r)
            if text.lower() in seen:
                continue
            seen.add(text.lower())
            rows.append((text, label, q))
            made += 1
    for q in queues:  # top each queue up to its target with exact copies of its own rows
        pool = [row for row in rows if row[2] == q]
        rows += r.sample(pool, counts[q] - len(pool))
    r.shuffle(rows)
    return [(text, label) for text, label, _ in rows]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--rows", type=int, default=N_ROWS)
    ap.add_argument("--out", type=Path, default=OUT)
    args = ap.parse_args()
    rows = generate(args.rows, args.seed)
    with open(args.out, "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["text", "queue"])
        w.writerows(rows)
    counts = collections.Counter(label for _, label in rows)
    summary = ", ".join(f"{q}={counts[q]}" for q in SHARES)
    print(f"wrote {len(rows)} rows to {args.out}: {summary}")


if __name__ == "__main__":
    main()
