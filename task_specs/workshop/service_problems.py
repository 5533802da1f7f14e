"""Workshop problem families about services, time and money: bookings, bills, hours, rentals, tips.

Each family takes (rng, variant, name) and returns (question, work, answer): the variant picks the
problem's shape and so its number of steps, the rng its numbers.
"""

from __future__ import annotations

from work import Money, Work, nouns

def service_bookings(r, v, name):
    w = Work()
    a, b = r.randint(4, 15), r.randint(2, 9)
    if v == 2:
        b = min(b, 2 * a - 1)  # Saturday must not go below zero
    w.given(a, b)
    if v == 0:
        q = (f"The workshop had {a} service bookings on Monday. Tuesday had {b} more bookings than "
             f"Monday, and Wednesday had twice as many as Tuesday. How many bookings were there in "
             f"the three days?")
        c, tue = w.calc(a, "+", b)
        w.say(f"Tuesday had {c} bookings.")
        c, wed = w.calc(tue, "*", 2)
        w.say(f"Wednesday had {c} bookings.")
        c, two = w.calc(a, "+", tue)
        w.say(f"Monday and Tuesday together had {c}.")
        c, ans = w.calc(two, "+", wed)
        w.say(f"Adding Wednesday gives {c} bookings.")
    elif v == 1:
        q = (f"{name} took {a} repair bookings on Friday and {b} more on Saturday than on Friday. "
             f"How many bookings did {name} take on the two days?")
        c, sat = w.calc(a, "+", b)
        w.say(f"Saturday had {c} bookings.")
        c, ans = w.calc(a, "+", sat)
        w.say(f"Both days together had {c} bookings.")
    else:
        q = (f"There were {a} bookings on Thursday, twice as many on Friday, and {b} fewer on "
             f"Saturday than on Friday. How many bookings were there over the three days?")
        c, fri = w.calc(a, "*", 2)
        w.say(f"Friday had {c} bookings.")
        c, sat = w.calc(fri, "-", b)
        w.say(f"Saturday had {c} bookings.")
        c, two = w.calc(a, "+", fri)
        w.say(f"Thursday and Friday together had {c}.")
        c, ans = w.calc(two, "+", sat)
        w.say(f"With Saturday that makes {c} bookings.")
    return q, w, ans


def labour_bill(r, v, name):
    w = Work()
    h, rate, parts = r.randint(1, 4), Money(r.choice([15, 20, 25, 30, 35, 40])), Money(r.randint(8, 60))
    w.given(h, rate, parts)
    if v == 0:
        note = Money(next(x for x in (100, 200, 300, 500) if x > h * rate + parts))
        w.given(note)
        q = (f"A full service on {name}'s bike takes {h} {nouns(h, 'hour')} of labour at ${rate} an hour, plus "
             f"${parts} for parts. {name} pays with a ${note} note. How many dollars of change does "
             f"{name} get?")
        c, labour = w.calc(h, "*", rate)
        w.say(f"The labour costs {c}.")
        c, bill = w.calc(labour, "+", parts)
        w.say(f"With the parts the bill is {c}.")
        c, ans = w.calc(note, "-", bill)
        w.say(f"The change is {c}.")
    elif v == 2:
        off = Money(r.choice([5, 10, 15]))
        note = Money(next(x for x in (100, 200, 300, 500) if x > h * rate + parts - off))
        w.given(off, note)
        q = (f"{name}'s e-bike needs {h} {nouns(h, 'hour')} of work at ${rate} an hour and ${parts} of parts. "
             f"A loyalty card takes ${off} off the bill, and {name} pays with a ${note} note. How "
             f"many dollars of change come back?")
        c, labour = w.calc(h, "*", rate)
        w.say(f"The work costs {c}.")
        c, bill = w.calc(labour, "+", parts)
        w.say(f"With the parts that is {c}.")
        c, paid = w.calc(bill, "-", off)
        w.say(f"The loyalty card brings it to {c}.")
        c, ans = w.calc(note, "-", paid)
        w.say(f"The change is {c}.")
    else:
        q = (f"Fixing a bent wheel takes {h} {nouns(h, 'hour')} at ${rate} per hour, and the new rim costs "
             f"${parts}. What is the bill in dollars?")
        c, labour = w.calc(h, "*", rate)
        w.say(f"Labour is {c}.")
        c, ans = w.calc(labour, "+", parts)
        w.say(f"Adding the rim, the bill is {c}.")
    return q, w, ans


def tune_ups(r, v, name):
    w = Work()
    while True:
        m, h, d, t = r.randint(2, 4), r.choice([5, 6, 7, 8]), r.randint(2, 5), r.choice([2, 3, 4])
        if (m * h * d) % t == 0 and (h * d) % t == 0:
            break
    if v == 0:
        w.given(m, h, d, t)
        q = (f"{m} mechanics each work {h} hours a day for {d} days. A tune-up takes {t} hours. "
             f"How many tune-ups can they finish in that time?")
        c, day = w.calc(m, "*", h)
        w.say(f"Each day they work {c} hours together.")
        c, hours = w.calc(day, "*", d)
        w.say(f"Over {d} days that is {c} hours.")
        c, ans = w.calc(hours, "/", t)
        w.say(f"At {t} hours per tune-up, they finish {c} tune-ups.")
    else:
        w.given(h, d, t)
        q = (f"{name} works {h} hours a day for {d} days, and each tune-up takes {t} hours. How many "
             f"tune-ups does {name} do?")
        c, hours = w.calc(h, "*", d)
        w.say(f"{name} works {c} hours.")
        c, ans = w.calc(hours, "/", t)
        w.say(f"That is {c} tune-ups.")
    return q, w, ans


def helmet_discount(r, v, name):
    w = Work()
    p, d, n = Money(r.randint(25, 60)), Money(r.choice([3, 4, 5, 6, 8, 10])), r.randint(3, 12)
    if v == 0:
        w.given(p, d, n)
        q = (f"A helmet costs ${p}. For a club order the workshop takes ${d} off each helmet. The "
             f"club buys {n} helmets. How many dollars does the club pay?")
        c, each = w.calc(p, "-", d)
        w.say(f"Each helmet costs {c}.")
        c, ans = w.calc(n, "*", each)
        w.say(f"{n} helmets cost {c}.")
    else:
        s = Money(r.choice([5, 8, 10, 12, 15]))
        w.given(p, d, n, s)
        q = (f"Helmets are ${p} each, with ${d} off each one for school orders. A school orders {n} "
             f"helmets and pays ${s} for delivery. What is the total cost in dollars?")
        c, each = w.calc(p, "-", d)
        w.say(f"One helmet costs {c}.")
        c, all_ = w.calc(n, "*", each)
        w.say(f"The helmets cost {c}.")
        c, ans = w.calc(all_, "+", s)
        w.say(f"With delivery the total is {c}.")
    return q, w, ans


def rentals(r, v, name):
    w = Work()
    rate, a, b = Money(r.choice([8, 10, 12, 15, 18, 20])), r.randint(3, 12), r.randint(3, 12)
    if v == 0:
        w.given(rate, a, b)
        q = (f"The workshop rents out bikes for ${rate} a day. On Saturday {a} bikes were rented "
             f"and on Sunday {b} bikes were rented. How many dollars of rent did the workshop take "
             f"over the weekend?")
        c, n = w.calc(a, "+", b)
        w.say(f"There were {c} rentals.")
        c, ans = w.calc(n, "*", rate)
        w.say(f"The rent came to {c}.")
    elif v == 2:
        fee, c3 = Money(r.choice([2, 3, 4, 5])), r.randint(2, 9)
        w.given(rate, fee, a, b, c3)
        q = (f"Renting a bike costs ${rate} a day and a lock costs ${fee} a day more. On Friday {a} "
             f"bikes went out with locks, on Saturday {b} and on Sunday {c3}, each for one day. How "
             f"many dollars did these rentals earn?")
        c, each = w.calc(rate, "+", fee)
        w.say(f"A bike with a lock earns {c} a day.")
        c, two = w.calc(a, "+", b)
        w.say(f"Friday and Saturday had {c} rentals.")
        c, n = w.calc(two, "+", c3)
        w.say(f"With Sunday there were {c} rentals.")
        c, ans = w.calc(n, "*", each)
        w.say(f"They earned {c}.")
    else:
        fee = Money(r.choice([2, 3, 4, 5]))
        w.given(rate, fee, a, b)
        q = (f"A day's bike rental costs ${rate}, plus a ${fee} helmet fee. {a} people rented on "
             f"Friday and {b} on Saturday, one day each. How many dollars did the rentals bring "
             f"in?")
        c, each = w.calc(rate, "+", fee)
        w.say(f"Each rental pays {c}.")
        c, n = w.calc(a, "+", b)
        w.say(f"There were {c} rentals.")
        c, ans = w.calc(n, "*", each)
        w.say(f"They brought in {c}.")
    return q, w, ans


def tips_split(r, v, name):
    w = Work()
    m, each, fund = r.randint(2, 5), r.randint(6, 30), Money(r.choice([5, 8, 10, 12, 15]))
    jar = Money(m * each + fund)
    if v == 0:
        w.given(jar, fund, m)
        q = (f"The tip jar holds ${jar}. ${fund} goes to the coffee fund, and the rest is shared "
             f"equally by {m} mechanics. How many dollars does each mechanic get?")
        c, rest = w.calc(jar, "-", fund)
        w.say(f"After the coffee fund, {c} is left.")
        c, ans = w.calc(rest, "/", m)
        w.say(f"Each mechanic gets {c}.")
    else:
        fri = Money(r.randint(5, jar - 5))
        w.given(fri, jar - fri, fund, m)
        q = (f"Customers left ${fri} in tips on Friday and ${jar - fri} on Saturday. The workshop "
             f"keeps ${fund} for cleaning cloths and splits the rest equally among {m} mechanics. "
             f"How many dollars does each get?")
        c, both = w.calc(fri, "+", Money(jar - fri))
        w.say(f"The tips add up to {c}.")
        c, rest = w.calc(both, "-", fund)
        w.say(f"After the cloths, {c} is left.")
        c, ans = w.calc(rest, "/", m)
        w.say(f"Each mechanic gets {c}.")
    return q, w, ans


def assembly_time(r, v, name):
    w = Work()
    while True:
        a, chk, n = r.choice([25, 35, 40, 45, 50]), r.choice([5, 10, 15, 20]), r.randint(2, 8)
        if n * (a + chk) % 60 == 0:
            break
    if v == 0:
        w.given(a, chk, n)
        q = (f"Assembling a new bike takes {a} minutes and the safety check takes another {chk} "
             f"minutes. How many hours does it take to assemble and check {n} bikes?")
        c, one = w.calc(a, "+", chk)
        w.say(f"One bike takes {c} minutes.")
        c, mins = w.calc(n, "*", one)
        w.say(f"{n} bikes take {c} minutes.")
        c, ans = w.calc(mins, "/", 60)
        w.say(f"There are 60 minutes in an hour, so that is {c} {nouns(ans, 'hour')}.")
    else:
        w.given(a, chk, n)
        q = (f"{name} needs {a} minutes to build a bike and {chk} minutes to test-ride it. How many "
             f"minutes does {name} need for {n} bikes?")
        c, one = w.calc(a, "+", chk)
        w.say(f"One bike takes {c} minutes.")
        c, ans = w.calc(n, "*", one)
        w.say(f"{n} bikes take {c} minutes.")
    return q, w, ans


def repair_hours(r, v, name):
    w = Work()
    h, d = r.choice([6, 7, 8, 9]), r.choice([4, 5, 6])
    if v == 0:
        x = r.randint(3, 12)
        w.given(h, d, x)
        q = (f"The workshop is open {h} hours a day, {d} days a week. {name} spends {x} hours a week "
             f"on paperwork. How many hours a week are left for repairs?")
        c, open_ = w.calc(h, "*", d)
        w.say(f"The workshop is open {c} hours a week.")
        c, ans = w.calc(open_, "-", x)
        w.say(f"Without the paperwork, {c} hours are left.")
    else:
        m = r.randint(2, 3)
        x = r.randint(5, 20)
        w.given(m, h, d, x)
        q = (f"{m} mechanics each work {h} hours a day, {d} days a week. Together they spend {x} "
             f"hours a week cleaning up. How many hours a week do they spend on repairs?")
        c, day = w.calc(m, "*", h)
        w.say(f"Together they work {c} hours a day.")
        c, week = w.calc(day, "*", d)
        w.say(f"That is {c} hours a week.")
        c, ans = w.calc(week, "-", x)
        w.say(f"Minus the cleaning, {c} hours go to repairs.")
    return q, w, ans
