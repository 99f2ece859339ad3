"""Writes corpus.txt: invented radio-log sentences of Kestrel Valley Ropeways.

Every sentence comes from a template below filled in with a fixed random seed,
so running this script again writes the same file byte for byte:

    python examples/ropeway/make_corpus.py            # writes corpus.txt beside it
    python examples/ropeway/make_corpus.py --check    # fails if a word is not in lexicon.txt

The words are lower case and all of them are in lexicon.txt; numbers are spelled
out ("twenty-three"), and times are read as two numbers ("fourteen thirty-five").
"""

from __future__ import annotations

import argparse
import pathlib
import random

HERE = pathlib.Path(__file__).resolve().parent
SEED = 20261201
NUM_SENTENCES = 6000

UNITS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
TEENS = ["ten", "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen",
         "seventeen", "eighteen", "nineteen"]
TENS = ["", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety"]


def number_words(n: int) -> str:
    """Spells 0..99 the way the operators say it: 'zero', 'fourteen', 'forty-two'."""
    if not 0 <= n <= 99:
        raise ValueError(n)
    if n < 10:
        return UNITS[n]
    if n < 20:
        return TEENS[n - 10]
    tens, unit = divmod(n, 10)
    return TENS[tens] if unit == 0 else f"{TENS[tens]}-{UNITS[unit]}"


class Radio:
    """Fills the templates; all randomness goes through one seeded generator."""

    def __init__(self, seed: int) -> None:
        self.rng = random.Random(seed)

    def pick(self, *options: str) -> str:
        return self.rng.choice(options)

    def num(self, lo: int, hi: int) -> str:
        return number_words(self.rng.randint(lo, hi))

    def cabin(self) -> str:
        return f"cabin {self.num(1, 36)}"

    def tower(self) -> str:
        return f"tower {self.num(1, 14)}"

    def time(self) -> str:
        hour = self.rng.randint(7, 19)
        minute = self.rng.choice([0, 5, 10, 15, 20, 25, 30, 35, 40, 45, 50, 55, 12, 48])
        if minute == 0:
            return f"{number_words(hour)} hundred"
        if minute < 10:
            return f"{number_words(hour)} zero {number_words(minute)}"
        return f"{number_words(hour)} {number_words(minute)}"

    def station(self) -> str:
        return self.pick("valley station", "summit station", "the valley station",
                         "the summit station", "control room", "the control room")

    def caller(self) -> str:
        return self.pick(self.cabin(), "valley station", "summit station", "control room",
                         "ski patrol", "the mechanic", "the electrician", f"crew at {self.tower()}",
                         "kestrel control", "kestrel valley ropeways control")

    def direction(self) -> str:
        return self.pick("north", "south", "east", "west")

    # -- messages, one per topic ---------------------------------------------------

    def wind(self) -> str:
        speed = self.rng.randint(4, 60)
        gust = min(99, speed + self.rng.randint(3, 25))
        return self.pick(
            f"wind at the summit {number_words(speed)} knots gusting {number_words(gust)}",
            f"winds from the {self.direction()} at {number_words(speed)} knots",
            f"gusts of {number_words(gust)} knots at {self.tower()}",
            f"wind speed {number_words(speed)} knots at the peak",
            f"wind is too strong for full speed",
            f"wind is {self.pick('calm', 'light', 'strong')} at the valley station",
            f"windy at the peak gusting {number_words(gust)} knots",
            f"gust limit is {number_words(gust)} knots",
            f"wind direction {self.direction()} speed {number_words(speed)} knots",
            f"the wind sensor on {self.tower()} shows {number_words(speed)} knots",
            f"sway on {self.cabin()} in the gusts",
            f"gusting {self.num(60, 99)} knots close the line now",
            f"the wind is not calm at {self.tower()}",
        )

    def hold(self) -> str:
        return self.pick(
            "hold the line",
            "hold one minute",
            "wait one minute",
            "the line is down",
            "hold hold hold all cabins hold",
            "hold all cabins",
            f"holding at {self.tower()}",
            f"{self.cabin()} is holding {self.num(2, 9)} hundred metres below {self.tower()}",
            f"line stopped at {self.time()}",
            f"we stopped the line for the wind",
            f"stop the line {self.pick('now', 'please', 'for the storm')}",
            f"line is on hold until {self.time()}",
            f"hold for {self.num(2, 45)} minutes",
            f"all cabins holding wait for clearance",
            f"wait at the platform for the next cabin",
            f"wait for the all clear",
        )

    def restart(self) -> str:
        return self.pick(
            f"restart the line at {self.time()}",
            f"line restarted at {self.time()} {self.pick('full', 'half')} speed",
            f"resume at {self.pick('half', 'full')} speed",
            "ready to resume",
            "line cleared to restart",
            "the line is cleared",
            "slow down the line",
            f"clear to restart",
            f"you are clear to start the drive",
            f"line running at {self.pick('half', 'full')} speed",
            f"slow the line to half speed",
            f"slower please the wind is strong",
            f"slowing for {self.cabin()} at the platform",
            f"line is moving again",
            f"start the engine on backup power",
            f"going to full speed now",
        )

    def passengers(self) -> str:
        return self.pick(
            f"{self.cabin()} {self.num(1, 80)} passengers on board",
            f"{self.num(2, 99)} passengers waiting in the queue at the valley station",
            f"loading {self.num(2, 60)} skiers at the summit",
            f"unloading {self.cabin()} at the summit station",
            f"{self.cabin()} is empty",
            f"{self.cabin()} full {self.num(40, 80)} passengers",
            f"queue at the valley station is {self.pick('long', 'short')}",
            f"guests are in their cabin",
            f"{self.num(2, 30)} guests aboard {self.cabin()}",
            f"weight limit on {self.cabin()} is {self.num(2, 9)} thousand",
            f"cargo weight {self.num(2, 9)} hundred",
            f"board the passengers at the platform",
            f"public service closed until tomorrow morning",
            f"the lift is closed to the public",
            f"lift open to the public at {self.time()}",
            f"round trip ticket fare is {self.num(10, 60)}",
            f"skiers on the downhill slope below {self.tower()}",
            f"uphill ride only",
        )

    def movement(self) -> str:
        return self.pick(
            f"{self.cabin()} departing the valley station",
            f"{self.cabin()} arriving at the summit",
            f"{self.cabin()} arrived at the {self.pick('valley', 'summit')} station",
            f"{self.cabin()} leaving {self.tower()}",
            f"{self.cabin()} approaching {self.tower()}",
            f"{self.cabin()} passing {self.tower()}",
            f"{self.cabin()} between {self.tower()} and {self.tower()}",
            f"{self.cabin()} in sight",
            f"{self.cabin()} is above {self.tower()}",
            f"{self.cabin()} back at the valley station",
            f"next cabin in {self.num(1, 15)} minutes",
            f"cars {self.num(1, 12)} to {self.num(13, 36)} are on the line",
            f"cargo cab on the line",
            f"the cargo car is up at the summit",
        )

    def maintenance(self) -> str:
        return self.pick(
            f"mechanic on the deck at {self.tower()}",
            f"mechanics on site at {self.tower()}",
            f"grease the grip on {self.cabin()}",
            f"brake test on the drive motor is good",
            f"brakes checked on the drive",
            f"crew on break until {self.time()}",
            f"the crew is on a break",
            f"oil on the platform at the summit station",
            f"bolts checked on {self.tower()}",
            f"bolt on the wheel at {self.tower()} is secured",
            f"inspection of the cable at {self.tower()}",
            f"inspection of the rope is good",
            f"door of {self.cabin()} is open",
            f"doors opened on {self.cabin()} at the platform",
            f"load test on {self.cabin()}",
            f"towers {self.num(1, 7)} to {self.num(8, 14)} are clear",
            "the brake is not on",
            f"door sensor fault on {self.cabin()}",
            f"doors closed and locked",
            f"lock the doors on {self.cabin()}",
            f"repair on {self.cabin()} before the first trip",
            f"maintenance on the drive engine until {self.time()}",
            f"the cargo car is holed near the door",
            f"a joint on the cargo car is holed",
            f"vibration at {self.tower()}",
            f"noise on the wheel at {self.tower()}",
            f"tension is normal",
            f"the sensor shows high tension on the rope",
            f"oil level is low on the drive",
            f"the electrician is here",
            f"electrician to the drive room please",
            f"gate at the platform is open",
            f"reset the alarm",
            f"alarm reset at the summit station",
            f"power fault on the drive backup generator running",
            f"power is back",
            f"haul rope tension normal",
            f"cargo haul to the summit at {self.time()}",
            f"the hall at the valley station is open",
            f"grease point on {self.tower()}",
        )

    def weather(self) -> str:
        return self.pick(
            f"weather update light snow visibility {self.num(1, 9)} hundred metres",
            f"temperature minus {self.num(1, 25)} degrees at the summit",
            f"temperature plus {self.num(1, 20)} degrees at the valley station",
            f"heavy rain at the valley station",
            f"fog and mist above {self.tower()}",
            f"mist at the summit visibility low",
            f"lightning near the peak all cabins hold",
            f"hail and thunder to the {self.direction()}",
            f"storm from the {self.direction()} in {self.num(10, 59)} minutes",
            f"fair weather today calm and clear",
            f"clouds are low on the peak",
            f"cloud above {self.tower()}",
            f"icing on the rope at {self.tower()}",
            f"ice on the platform at the summit",
            f"snowing at the summit",
            f"heavy snow this evening",
            f"check whether the wind is calm at the summit",
            f"check whether the brake is on",
            f"visibility is good",
        )

    def radio(self) -> str:
        return self.pick(
            "copy that",
            "all stations this is kestrel control",
            "copy",
            "say again please",
            "say again the number",
            "i read you loud and clear",
            "read you loud and clear",
            "roger over",
            "roger that over",
            "repeat the last number",
            "negative",
            "affirmative",
            "yes",
            "no",
            "okay thanks",
            "thanks",
            "i hear you",
            "we hear you loud and clear",
            "confirm",
            "confirmed",
            "standing by",
            "over and out",
            "i know",
            "we knew that",
            "that is right",
            "right",
            "write it in the log",
            "please write that in the log",
            "noise on the radio say again",
            "this is kestrel control",
        )

    def operations(self) -> str:
        return self.pick(
            f"first cabin at {self.time()}",
            f"time check {self.time()}",
            f"passenger count {self.num(0, 99)}",
            f"last cabin at {self.time()}",
            f"the last trip is at {self.time()}",
            f"{self.cabin()} missed the last trip",
            f"new schedule from tomorrow",
            f"the new rope is on",
            f"schedule is {self.num(2, 9)} hours today",
            f"delay of {self.num(2, 40)} minutes",
            f"line delayed by {self.num(2, 40)} minutes",
            f"we are {self.num(2, 20)} minutes delayed",
            f"back before noon",
            f"after {self.time()}",
            f"{self.num(1, 9)} hour delay",
            f"the second cabin is off the line",
            f"cabins {self.num(1, 18)} and {self.num(19, 36)} off the line",
            f"operators to the control room",
            f"operator at the summit station is {self.pick('here', 'there', 'ready')}",
            f"the crew is there now",
            f"ski patrol there at {self.tower()}",
            f"ski patrol on the slope below {self.tower()}",
            f"medical to the summit station",
            f"doctor to the valley station please",
            f"rescue crew to {self.tower()}",
            f"evacuation of {self.cabin()} with the rescue crew",
            f"no passengers on {self.cabin()}",
            f"no fault on the drive",
            f"red light on the {self.pick('drive', 'platform', 'control', 'gate')}",
            f"the number of passengers is {self.num(2, 99)}",
            f"about {self.num(2, 99)} skiers in the queue",
            f"run the {self.pick('first', 'last', 'second')} cabin empty",
            "go when ready",
            f"stop at the platform",
            f"the line is running good",
            "we are going to stop",
        )

    def sentence(self) -> str:
        topic = self.rng.choices(
            [self.wind, self.hold, self.restart, self.passengers, self.movement,
             self.maintenance, self.weather, self.radio, self.operations],
            weights=[12, 9, 9, 11, 12, 14, 10, 9, 12],
        )[0]
        message = topic()
        form = self.rng.random()
        if form < 0.35:
            return message
        if form < 0.65:
            return f"{self.caller()} to {self.station()} {message}"
        if form < 0.85:
            return f"{self.station()} this is {self.caller()} {message} over"
        return f"{message} {self.pick('over', 'thanks', 'copy', 'out')}"


def lexicon_words(path: pathlib.Path) -> set[str]:
    lines = path.read_text(encoding="utf-8").splitlines()
    return {line.split()[0] for line in lines if line.strip() and not line.startswith("#")}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true",
                        help="only check that the corpus would use lexicon words")
    args = parser.parse_args()
    radio = Radio(SEED)
    lines = [radio.sentence() for _ in range(NUM_SENTENCES)]
    known = lexicon_words(HERE / "lexicon.txt")
    used = {w for line in lines for w in line.split()}
    unknown = sorted(used - known)
    if unknown:
        raise SystemExit(f"words not in lexicon.txt: {' '.join(unknown)}")
    if args.check:
        print(f"{len(lines)} sentences; {len(used)} of {len(known)} lexicon words used")
        unused = sorted(known - used)
        if unused:
            print("unused:", " ".join(unused))
        return
    (HERE / "corpus.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {len(lines)} sentences to {HERE / 'corpus.txt'}")


if __name__ == "__main__":
    main()
