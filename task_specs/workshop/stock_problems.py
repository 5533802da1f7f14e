"""Workshop problem families about parts and stock: spokes, tubes, chains, pads, cable, orders, sales.

Each family takes (rng, variant, name) and returns (question, work, answer): the variant picks the
problem's shape and so its number of steps, the rng its numbers.
"""

from __future__ import annotations

from work import Money, Work, nouns

def wheel_spokes(r, v, name):
    w = Work()
    s = r.choice([24, 28, 32, 36])
    if v == 0:
        n = r.randint(2, 6)
        total = 2 * n * s
        h = r.randint(10, total - 10)
        w.given(n, s, h)
        q = (f"{name} is building {n} pairs of wheels. Each wheel needs {s} spokes. "
             f"The workshop has {h} spokes in stock. How many more spokes must {name} order?")
        c, wheels = w.calc(n, "*", 2)
        w.say(f"{n} pairs of wheels is {c} wheels.")
        c, need = w.calc(wheels, "*", s)
        w.say(f"Each wheel needs {s} spokes, so {wheels} wheels need {c} spokes.")
        c, ans = w.calc(need, "-", h)
        w.say(f"The workshop has {h} spokes, so {name} must order {c} more spokes.")
    else:
        n = r.randint(3, 12)
        h = r.randint(5, n * s - 5)
        w.given(n, s, h)
        q = (f"A wheel needs {s} spokes. {name} has {h} spokes and wants to build {n} wheels. "
             f"How many spokes are missing?")
        c, need = w.calc(n, "*", s)
        w.say(f"{n} wheels need {c} spokes.")
        c, ans = w.calc(need, "-", h)
        w.say(f"{name} has {h}, so {c} spokes are missing.")
    return q, w, ans


def tube_patches(r, v, name):
    w = Work()
    while True:
        p, k, kits = r.choice([2, 3]), r.choice([4, 5, 6, 8, 10]), r.randint(2, 9)
        if kits * k % p == 0:
            break
    tubes = kits * k // p
    if v == 0:
        w.given(tubes, p, k)
        q = (f"{name} patched {tubes} inner tubes last week, and each tube needed {p} patches. "
             f"A patch kit holds {k} patches. How many kits did {name} use up?")
        c, used = w.calc(tubes, "*", p)
        w.say(f"{tubes} tubes with {p} patches each is {c} patches.")
        c, ans = w.calc(used, "/", k)
        w.say(f"Each kit holds {k} patches, so {c} kits were used.")
    else:
        t1 = r.randint(1, tubes - 1)
        t2 = tubes - t1
        w.given(t1, t2, p, k)
        q = (f"On Monday {name} patched {t1} {nouns(t1, 'inner tube')} and on Tuesday {t2} more. Every tube needed "
             f"{p} patches, and a patch kit holds {k} patches. How many kits were used?")
        c, both = w.calc(t1, "+", t2)
        w.say(f"Over the two days {name} patched {c} tubes.")
        c, used = w.calc(both, "*", p)
        w.say(f"That is {c} patches.")
        c, ans = w.calc(used, "/", k)
        w.say(f"With {k} patches per kit, {c} kits were used.")
    return q, w, ans


def chain_stock(r, v, name):
    w = Work()
    stock, s1, s2 = r.randint(20, 60), r.randint(2, 9), r.randint(2, 9)
    boxes, per = r.randint(2, 5), r.choice([6, 8, 10, 12])
    if v == 0:
        w.given(stock, s1, s2, boxes, per)
        q = (f"The workshop had {stock} chains in stock. It sold {s1} chains on Monday and {s2} on "
             f"Tuesday. Then a delivery of {boxes} boxes with {per} chains in each box arrived. "
             f"How many chains are in stock now?")
        c, a = w.calc(stock, "-", s1)
        w.say(f"After Monday there were {c} chains.")
        c, b = w.calc(a, "-", s2)
        w.say(f"After Tuesday there were {c} chains.")
        c, d = w.calc(boxes, "*", per)
        w.say(f"The delivery brought {c} chains.")
        c, ans = w.calc(b, "+", d)
        w.say(f"Now there are {c} chains.")
    else:
        w.given(stock, s1, boxes, per)
        q = (f"{name} counted {stock} chains on the shelf, fitted {s1} of them, and then unpacked "
             f"{boxes} boxes of {per} chains. How many chains are on the shelf now?")
        c, a = w.calc(stock, "-", s1)
        w.say(f"After fitting, {c} chains were left.")
        c, d = w.calc(boxes, "*", per)
        w.say(f"The boxes held {c} chains.")
        c, ans = w.calc(a, "+", d)
        w.say(f"So the shelf has {c} chains.")
    return q, w, ans


def brake_pads(r, v, name):
    w = Work()
    while True:
        pads, k, bikes = r.choice([2, 4]), r.choice([4, 8, 10, 12]), r.randint(3, 15)
        if bikes * pads % k == 0:
            break
    if v == 0:
        sat = r.randint(1, bikes - 1)
        w.given(pads, sat, bikes - sat, k)
        q = (f"Each bike needs {pads} new brake pads. {name} services {sat} {nouns(sat, 'bike')} on Saturday and "
             f"{bikes - sat} {nouns(bikes - sat, 'bike')} on Sunday. Brake pads come in packs of {k}. How many packs does "
             f"{name} need?")
        c, n = w.calc(sat, "+", bikes - sat)
        w.say(f"{name} services {c} bikes.")
        c, total = w.calc(n, "*", pads)
        w.say(f"They need {c} pads.")
        c, ans = w.calc(total, "/", k)
        w.say(f"In packs of {k} that is {c} {nouns(ans, 'pack')}.")
    else:
        w.given(bikes, pads, k)
        q = (f"{name} is replacing the brake pads on {bikes} bikes, {pads} pads per bike. Pads are "
             f"sold in packs of {k}. How many packs should {name} open?")
        c, total = w.calc(bikes, "*", pads)
        w.say(f"The bikes need {c} pads.")
        c, ans = w.calc(total, "/", k)
        w.say(f"That is {c} {nouns(ans, 'pack')}.")
    return q, w, ans


def cable_roll(r, v, name):
    w = Work()
    f, b, n = r.choice([80, 90, 100, 110]), r.choice([150, 160, 170, 180]), r.randint(2, 4)
    length = r.choice([x for x in range(500, 1300, 100) if x > n * (f + b)])
    w.given(length, f, b, n)
    q = (f"A roll of brake cable is {length} cm long. Each bike needs {f} cm for the front brake "
         f"and {b} cm for the rear brake. After {name} fits {n} bikes, how many cm of cable are "
         f"left on the roll?")
    c, per = w.calc(f, "+", b)
    w.say(f"One bike uses {c} cm.")
    c, used = w.calc(n, "*", per)
    w.say(f"{n} bikes use {c} cm.")
    c, ans = w.calc(length, "-", used)
    w.say(f"The roll has {c} cm left.")
    return q, w, ans


def parts_order(r, v, name):
    w = Work()
    g, pb = r.randint(2, 6), Money(r.choice([18, 20, 24, 30, 36]))
    s, ps = r.randint(2, 5), Money(r.choice([15, 22, 25, 28, 40]))
    if v == 0:
        w.given(g, pb, s, ps)
        q = (f"{name} orders {g} boxes of inner tubes at ${pb} a box and {s} saddles at ${ps} each. "
             f"What is the total cost of the order in dollars?")
        c, tubes = w.calc(g, "*", pb)
        w.say(f"The tubes cost {c}.")
        c, saddles = w.calc(s, "*", ps)
        w.say(f"The saddles cost {c}.")
        c, ans = w.calc(tubes, "+", saddles)
        w.say(f"The order costs {c}.")
    else:
        off = Money(r.choice([10, 15, 20, 25]))
        w.given(g, pb, s, ps, off)
        q = (f"The workshop buys {g} boxes of tyres at ${pb} per box and {s} chains at ${ps} per "
             f"chain, and uses a ${off} voucher. How many dollars does it pay?")
        c, tyres = w.calc(g, "*", pb)
        w.say(f"The tyres cost {c}.")
        c, chains = w.calc(s, "*", ps)
        w.say(f"The chains cost {c}.")
        c, both = w.calc(tyres, "+", chains)
        w.say(f"Together that is {c}.")
        c, ans = w.calc(both, "-", off)
        w.say(f"After the voucher the workshop pays {c}.")
    return q, w, ans


def spoke_bags(r, v, name):
    w = Work()
    while True:
        wheels, broken, k = r.randint(2, 12), r.randint(2, 6), r.choice([4, 6, 8, 10, 12])
        if wheels * broken % k == 0 and wheels >= 2:
            break
    if v == 0:
        w.given(wheels, broken, k)
        q = (f"{wheels} wheels came in for repair, each with {broken} broken spokes. Spokes come in "
             f"bags of {k}. How many bags does {name} need to replace all the broken spokes?")
        c, total = w.calc(wheels, "*", broken)
        w.say(f"There are {c} broken spokes.")
        c, ans = w.calc(total, "/", k)
        w.say(f"In bags of {k} that is {c} {nouns(ans, 'bag')}.")
    else:
        front = r.randint(1, wheels - 1)
        w.given(front, wheels - front, broken, k)
        q = (f"{front} front {nouns(front, 'wheel')} and {wheels - front} rear "
             f"{nouns(wheels - front, 'wheel')} each have {broken} broken "
             f"spokes. A bag holds {k} spokes. How many bags of spokes are needed?")
        c, n = w.calc(front, "+", wheels - front)
        w.say(f"There are {c} wheels.")
        c, total = w.calc(n, "*", broken)
        w.say(f"They have {c} broken spokes.")
        c, ans = w.calc(total, "/", k)
        w.say(f"That needs {c} {nouns(ans, 'bag')}.")
    return q, w, ans


def shop_sales(r, v, name):
    w = Work()
    while True:
        bell, light = Money(r.choice([4, 5, 6, 7, 8])), Money(r.choice([12, 15, 18, 20, 25]))
        nb, nl = r.randint(4, 15), r.randint(2, 10)
        if nl * light > nb * bell:
            break
    w.given(bell, light, nb, nl)
    q = (f"The workshop sells bells for ${bell} and lights for ${light}. On Friday it sold {nb} "
         f"bells and {nl} lights. How many more dollars came from lights than from bells?")
    c, bells = w.calc(nb, "*", bell)
    w.say(f"The bells brought in {c}.")
    c, lights = w.calc(nl, "*", light)
    w.say(f"The lights brought in {c}.")
    c, ans = w.calc(lights, "-", bells)
    w.say(f"The lights brought in {c} more.")
    return q, w, ans
