"""The language registry: grammar wheels, qualified names, signatures and doc pairing.

Doc pairing is checked case by case against each language's own documentation
convention, named beside its table (the conventions are quoted from memory of
their specifications). The inputs are small invented programs in the sample
repository's bike-share setting. Extraction on real code is checked against
Universal Ctags in ``test_ctags.py``, and Python against ``ast`` in
``test_parse_python.py``.
"""

from __future__ import annotations

import re
import textwrap
import tomllib
from dataclasses import dataclass
from pathlib import Path

import pytest

from codeseek.languages import all_specs, language_names, spec_by_name, spec_for_path
from codeseek.parse import parse_source
from codeseek.units import CodeUnit

PROJECT = Path(__file__).resolve().parent.parent


def units_of(language: str, source: str) -> list[CodeUnit]:
    spec = spec_by_name(language)
    return list(parse_source(f"example{spec.extensions[0]}", source.encode(), spec).units)


def unit_named(language: str, source: str, qualname: str, ordinal: int = 0) -> CodeUnit:
    units = units_of(language, textwrap.dedent(source))
    found = [u for u in units if u.qualname == qualname and u.ordinal == ordinal]
    assert found, f"no {qualname!r} among {[u.qualname for u in units]}"
    return found[0]


# -- the registry and the grammar wheels -----------------------------------------------------


def test_every_issue_language_is_registered() -> None:
    assert set(language_names()) == {"python", "javascript", "typescript", "tsx", "go", "rust",
                                     "java", "c", "cpp", "ruby"}
    cases = {"a.js": "javascript", "a.mjs": "javascript", "a.cjs": "javascript",
             "a.jsx": "javascript", "a.ts": "typescript", "a.tsx": "tsx", "a.go": "go",
             "a.rs": "rust", "a.java": "java", "a.c": "c", "a.h": "cpp", "a.cc": "cpp",
             "a.cpp": "cpp", "a.hpp": "cpp", "a.rb": "ruby", "a.py": "python"}
    for name, language in cases.items():
        spec = spec_for_path(name)
        assert spec is not None and spec.name == language, name


def test_every_grammar_fits_the_installed_tree_sitter() -> None:
    import tree_sitter

    # reference: the ABI range py-tree-sitter itself declares it can load
    low, high = tree_sitter.MIN_COMPATIBLE_LANGUAGE_VERSION, tree_sitter.LANGUAGE_VERSION
    for spec in all_specs():
        language = spec.language()
        assert low <= language.abi_version <= high, (spec.name, language.abi_version)
        tree_sitter.Parser(language)  # refuses a language of another ABI
        tree_sitter.Query(language, spec.query_source())  # every node type the query names exists


def test_every_grammar_wheel_is_a_declared_dependency() -> None:
    # reference: pyproject.toml, which a fresh install (CI, scripts/setup.sh) reads
    project = tomllib.loads((PROJECT / "pyproject.toml").read_text(encoding="utf-8"))
    declared = {re.split(r"[<>=!~ ;\[]", dep, maxsplit=1)[0].lower()
                for dep in project["project"]["dependencies"]}
    for spec in all_specs():
        assert spec.grammar_module.replace("_", "-") in declared, spec.grammar_module


def test_readme_names_every_language() -> None:
    readme = (PROJECT / "README.md").read_text(encoding="utf-8")
    row = next(line for line in readme.splitlines() if line.startswith("| `--language L`"))
    listed = re.findall(r"`([a-z]+)`", row.split("|")[2])
    assert sorted(listed) == language_names()


# -- doc pairing, per language ---------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    """One tricky pairing: the unit ``qualname`` of ``source`` must have doc ``doc``."""

    label: str
    source: str
    qualname: str
    doc: str
    kind: str | None = None
    ordinal: int = 0


# JSDoc: a /** */ block directly before the declaration, or before its export
# (reference: JSDoc "Getting started" and TSDoc, from memory).
JAVASCRIPT = [
    Case("plain function", """
        /** Distance in metres between two docks. */
        function distance(a, b) { return 0; }
        """, "distance", "Distance in metres between two docks.", "function"),
    Case("export default anonymous", """
        /** Count the bikes parked at every station. */
        export default function () { return 1; }
        """, "default", "Count the bikes parked at every station.", "function"),
    Case("arrow bound to a const, exported", """
        /**
         * Minutes left before the overtime rate applies.
         * @param {number} elapsed
         */
        export const minutesLeft = (elapsed) => 45 - elapsed;
        """, "minutesLeft",
         "Minutes left before the overtime rate applies.\n@param {number} elapsed"),
    Case("exports.x = function", """
        /** Lock every dock of a station for maintenance. */
        exports.lockStation = function (station) {};
        """, "lockStation", "Lock every dock of a station for maintenance.", "function"),
    Case("prototype method", """
        function Dock() {}
        /** Release the bike held by this dock. */
        Dock.prototype.release = function () {};
        """, "Dock.release", "Release the bike held by this dock.", "method"),
    Case("doc inside a class body", """
        class TripTimer {
          /** Start timing when the bike leaves the dock. */
          start() {}
        }
        """, "TripTimer.start", "Start timing when the bike leaves the dock.", "method"),
    Case("a blank line breaks the pairing", """
        /** Orphaned note about stations. */

        function stations() {}
        """, "stations", ""),
    Case("licence header above the first function", """
        /**
         * Copyright 2024 Brindlemoor Transit Lab. Licensed under the MIT licence.
         */
        function first() {}
        """, "first", ""),
    Case("a plain comment is not JSDoc", """
        // Helper for the map.
        function pin() {}
        """, "pin", ""),
    Case("a lint directive between doc and code", """
        /** Parse a dock packet. */
        // eslint-disable-next-line no-bitwise
        function parsePacket(raw) {}
        """, "parsePacket", "Parse a dock packet."),
    Case("named callback inside an anonymous one", """
        stations.forEach(function (s) {
          /** Mark one station as seen. */
          function markSeen() {}
        });
        """, "markSeen", "Mark one station as seen."),
    Case("object literal method qualified by its variable", """
        const api = {
          /** Ask the dock to unlock. */
          unlock() {},
        };
        """, "api.unlock", "Ask the dock to unlock.", "method"),
]

# TSDoc: as JSDoc; decorators sit between the doc and the declaration; the doc of
# an overloaded function is written on its first signature (reference: TSDoc and
# the TypeScript handbook on overloads, from memory).
TYPESCRIPT = [
    Case("decorator between doc and method", """
        class Fleet {
          /** Move bikes towards the busiest stations. */
          @scheduled("hourly")
          rebalance(): void {}
        }
        """, "Fleet.rebalance", "Move bikes towards the busiest stations.", "method"),
    Case("decorated exported class", """
        /** Telemetry gateway for one district. */
        @Injectable()
        export class Gateway {}
        """, "Gateway", "Telemetry gateway for one district.", "class"),
    Case("overloads: the implementation takes the first signature's doc", """
        /** Parse a station code ("BM-0042") or pass a number through. */
        export function stationId(code: string): number;
        export function stationId(id: number): number;
        export function stationId(value: string | number): number { return 0; }
        """, "stationId", 'Parse a station code ("BM-0042") or pass a number through.'),
    Case("overloaded method", """
        class Map {
          /** Centre the map on a station or a point. */
          centre(id: number): void;
          centre(lat: number, lon: number): void;
          centre(a: number, b?: number): void {}
        }
        """, "Map.centre", "Centre the map on a station or a point.", "method"),
    Case("interface method signature", """
        interface Pager {
          /** Page the on-call technician. */
          page(message: string): Promise<void>;
        }
        """, "Pager.page", "Page the on-call technician.", "method"),
    Case("namespace qualifies", """
        namespace Billing {
          /** Give a deposit back. */
          export function returnDeposit(): void {}
        }
        """, "Billing.returnDeposit", "Give a deposit back.", "function"),
    Case("abstract method", """
        abstract class Rule {
          /** Adjust a fare in cents. */
          abstract adjust(cents: number): number;
        }
        """, "Rule.adjust", "Adjust a fare in cents.", "method"),
    Case("export default anonymous class", """
        /** The dashboard's default store. */
        export default class {}
        """, "default", "The dashboard's default store.", "class"),
]

TSX = [
    Case("function component", """
        /** The card of one station on the map. */
        export function StationCard({ name }: { name: string }) {
          return <article><h3>{name}</h3></article>;
        }
        """, "StationCard", "The card of one station on the map.", "function"),
    Case("arrow component", """
        /** A badge for a dock's health. */
        export const Badge = ({ text }: { text: string }) => <span>{text}</span>;
        """, "Badge", "A badge for a dock's health.", "function"),
    Case("memo-wrapped component named by its variable", """
        /** The map legend. */
        const Legend = memo(function LegendView() { return <ul />; });
        """, "Legend", "The map legend.", "function"),
    Case("default-exported component", """
        /** Banner above the map. */
        export default function Banner() { return <div role="status" />; }
        """, "Banner", "Banner above the map."),
]

# Go doc comments: the // lines directly above the declaration, no blank line
# between; directives (//go:...) are not part of the doc (reference: go.dev/doc/comment,
# from memory).
GO = [
    Case("method on a pointer receiver", """
        package ledger

        // Post records a ride charge in the ledger.
        func (l *Ledger) Post(cents int) error { return nil }
        """, "(*Ledger).Post", "Post records a ride charge in the ledger.", "method"),
    Case("method on a value receiver", """
        package ledger

        // Total is the sum of all charges.
        func (l Ledger) Total() int { return 0 }
        """, "Ledger.Total", "Total is the sum of all charges.", "method"),
    Case("generic receiver: type parameters dropped", """
        package ring

        // Push adds a reading.
        func (r *Ring[T]) Push(v T) {}
        """, "(*Ring).Push", "Push adds a reading."),
    Case("a directive is not doc text", """
        package dockd

        // Checksum folds a packet with XOR.
        //
        //go:noinline
        func Checksum(b []byte) byte { return 0 }
        """, "Checksum", "Checksum folds a packet with XOR."),
    Case("a blank line breaks the pairing", """
        package dockd

        // This file decodes packets.

        func decode() {}
        """, "decode", ""),
    Case("commented-out code is not a doc", """
        package dockd

        // x := compute(raw)
        // if x > limit {
        // \treturn
        // }
        func compute() {}
        """, "compute", ""),
    Case("a type in a group takes its own comment", """
        package dockd

        type (
        \t// Packet is one raw dock message.
        \tPacket struct{ raw []byte }
        )
        """, "Packet", "Packet is one raw dock message.", "class"),
    Case("interface method", """
        package dockd

        type Pager interface {
        \t// Page sends one alert.
        \tPage(msg string) error
        }
        """, "Pager.Page", "Page sends one alert.", "method"),
]

# Rust: outer doc comments (/// and /** */) before the item, attributes allowed
# between; // and //! are not outer docs (reference: The Rust Reference,
# "Doc comments", from memory).
RUST = [
    Case("attribute between doc and fn", """
        /// Round a fare to the nearest five cents.
        #[inline]
        #[must_use]
        pub fn round_to_nickel(cents: u32) -> u32 { cents }
        """, "round_to_nickel", "Round a fare to the nearest five cents.", "function"),
    Case("trait impl method", """
        impl Tariff for Peak {
            /// Price a ride in the evening peak.
            fn price(&self) -> u32 { 0 }
        }
        """, "impl Tariff for Peak::price", "Price a ride in the evening peak.", "method"),
    Case("inherent impl of a generic type", """
        impl<T: Copy> Ring<T> {
            /// Add one reading.
            pub fn push(&mut self, v: T) {}
        }
        """, "Ring::push", "Add one reading.", "method"),
    Case("block doc comment", """
        /** A bike class with its own fare table. */
        pub enum BikeClass { Standard, Electric }
        """, "BikeClass", "A bike class with its own fare table.", "class"),
    Case("plain comment is not a doc", """
        // helper
        fn helper() {}
        """, "helper", ""),
    Case("inner doc belongs to the module, not the fn", """
        //! Fare rules.
        fn rules() {}
        """, "rules", ""),
    Case("trait method declaration", """
        pub trait FareRule {
            /// The rule's name on receipts.
            fn name(&self) -> &'static str;
        }
        """, "FareRule::name", "The rule's name on receipts.", "method"),
    Case("nested fn in a module", """
        mod tests {
            /// Checks the daily cap.
            fn cap() {}
        }
        """, "tests::cap", "Checks the daily cap.", "function"),
]

# Javadoc: /** */ before the declaration, its annotations and modifiers after it
# (reference: "How to Write Doc Comments for the Javadoc Tool", from memory).
JAVA = [
    Case("annotations between doc and method", """
        class Dock {
            /** Release the bike held by this dock. */
            @Override
            @Deprecated
            public void release() {}
        }
        """, "Dock.release", "Release the bike held by this dock.", "method"),
    Case("overloads each keep their own doc", """
        class Fares {
            /** Price a ride by minutes. */
            int price(int minutes) { return 0; }
            /** Price a ride by minutes and bike class. */
            int price(int minutes, String bikeClass) { return 0; }
        }
        """, "Fares.price", "Price a ride by minutes and bike class.", "method", 1),
    Case("licence header above the first class", """
        /**
         * Copyright 2024 Brindlemoor Transit Lab.
         * Licensed under the Apache License, Version 2.0.
         */
        public class Station {}
        """, "Station", ""),
    Case("a blank line breaks the pairing", """
        class Dock {
            /** Stray note. */

            void lock() {}
        }
        """, "Dock.lock", ""),
    Case("interface method and nested type", """
        interface Pager {
            /** Page the technician on call. */
            void page(String message);
        }
        """, "Pager.page", "Page the technician on call.", "method"),
    Case("constructor", """
        class Dock {
            /** A dock at a station slot. */
            Dock(int slot) {}
        }
        """, "Dock.Dock", "A dock at a station slot.", "method"),
]

# C and C++: /** */, /*! */, /// or //! (reference: Doxygen's manual, "Documenting
# the code", from memory), and plain // runs or /* */ blocks directly above, the
# way much C is documented (the issue asks for // blocks; /* */ is read the same).
C = [
    Case("javadoc-style block", """
        /** Decode one status packet from a dock. */
        int decode_packet(const unsigned char *raw, int len) { return 0; }
        """, "decode_packet", "Decode one status packet from a dock.", "function"),
    Case("a run of // lines", """
        // Fold the packet bytes with XOR.
        // The last byte is not included.
        static unsigned char xor_sum(const unsigned char *b, int n) { return 0; }
        """, "xor_sum", "Fold the packet bytes with XOR.\nThe last byte is not included."),
    Case("a plain block comment documents too", """
        /* Checksum of a packet, as the dock computes it
         * (XOR of every byte but the last). */
        static int checksum(const char *raw) { return 0; }
        """, "checksum",
         "Checksum of a packet, as the dock computes it\n(XOR of every byte but the last)."),
    Case("a banner is not a doc", """
        /* ---- packet helpers ---- */
        int helper(void) { return 0; }
        """, "helper", ""),
    Case("commented-out code in a block comment", """
        /* old = decode(raw);
           if (old < 0) return old; */
        int decode_v2(void) { return 0; }
        """, "decode_v2", ""),
    Case("licence header above the first function", """
        // Copyright 2024 Brindlemoor Transit Lab.
        // SPDX-License-Identifier: MIT
        int first(void) { return 0; }
        """, "first", ""),
    Case("commented-out code", """
        // int old = decode(raw);
        // if (old < 0) {
        //     return old;
        // }
        int decode(void) { return 0; }
        """, "decode", ""),
    Case("function returning a function pointer", """
        /** Pick the handler of a packet type. */
        int (*handler_for(int type))(const char *) { return 0; }
        """, "handler_for", "Pick the handler of a packet type."),
    Case("typedef of an anonymous struct", """
        /** One decoded status report. */
        typedef struct { int dock_id; } dock_status;
        """, "dock_status", "One decoded status report.", "class"),
]

CPP = [
    Case("out-of-line Class::method in a namespace", """
        namespace fleet {
        /// Release the bike held by this dock.
        void Dock::release() {}
        }
        """, "fleet::Dock::release", "Release the bike held by this dock.", "method"),
    Case("template: doc above the template header", """
        /// Average of the readings in a window.
        template <typename T>
        T average(const T *values, int n) { return T(); }
        """, "average", "Average of the readings in a window.", "function"),
    Case("doc inside a class body", """
        class Dock {
         public:
          /** True while a bike is locked in. */
          bool occupied() const { return true; }
        };
        """, "Dock::occupied", "True while a bike is locked in.", "method"),
    Case("export macro on a class", """
        class FLEET_API Station {
         public:
          /// Free docks right now.
          int free_docks() const { return 0; }
        };
        """, "Station::free_docks", "Free docks right now.", "method"),
    Case("annotation macro after the parameters", """
        class Ledger {
          /// Post one charge.
          void Post(int cents) LOCKS_EXCLUDED(mu_) { }
        };
        """, "Ledger::Post", "Post one charge.", "method"),
    Case("operator and destructor", """
        struct Fare {
          /// Fares add up.
          Fare operator+(const Fare &o) const { return o; }
          /// Nothing to free.
          ~Fare() {}
        };
        """, "Fare::~Fare", "Nothing to free.", "method"),
]

# Ruby: the # lines directly above def/class/module (reference: RDoc and YARD
# conventions, from memory); magic comments are not doc text.
RUBY = [
    Case("instance method in a nested class", """
        module Kestrune
          class Dock
            # Release the bike held by this dock.
            # @param force [Boolean] skip the lock check
            def release(force: false); end
          end
        end
        """, "Kestrune::Dock#release",
         "Release the bike held by this dock.\n@param force [Boolean] skip the lock check",
         "method"),
    Case("singleton method", """
        class Dock
          # Build a dock from a status packet.
          def self.from_packet(raw); end
        end
        """, "Dock.from_packet", "Build a dock from a status packet.", "method"),
    Case("class << self", """
        class Dock
          class << self
            # Every dock of a station.
            def at(station); end
          end
        end
        """, "Dock.at", "Every dock of a station.", "method"),
    Case("private def", """
        class Dock
          # Seconds since the last packet.
          private def silence; end
        end
        """, "Dock#silence", "Seconds since the last packet."),
    Case("magic comment above the first class", """
        # frozen_string_literal: true
        # A station of docks.
        class Station; end
        """, "Station", "A station of docks.", "class"),
    Case("a blank line breaks the pairing", """
        # Unrelated note.

        def orphan; end
        """, "orphan", "", "function"),
    Case("commented-out code", """
        # def old_release
        #   unlock!
        # end
        def release; end
        """, "release", ""),
]

TABLES = {"javascript": JAVASCRIPT, "typescript": TYPESCRIPT, "tsx": TSX, "go": GO,
          "rust": RUST, "java": JAVA, "c": C, "cpp": CPP, "ruby": RUBY}
ALL_CASES = [(language, case) for language, cases in TABLES.items() for case in cases]


@pytest.mark.parametrize(("language", "case"), ALL_CASES,
                         ids=[f"{lang}: {case.label}" for lang, case in ALL_CASES])
def test_doc_pairing(language: str, case: Case) -> None:
    unit = unit_named(language, case.source, case.qualname, case.ordinal)
    assert unit.doc == case.doc
    if case.kind is not None:
        assert unit.kind == case.kind


def test_every_language_has_a_pairing_table() -> None:
    assert set(TABLES) == set(language_names()) - {"python"}  # Python: test_parse_python.py


# -- what a unit is, per language ------------------------------------------------------------


def qualnames(language: str, source: str) -> list[tuple[str, str]]:
    return [(u.kind, u.qualname) for u in units_of(language, textwrap.dedent(source))]


def test_anonymous_functions_stay_inside_their_parent() -> None:
    assert qualnames("javascript", """
        setTimeout(() => { tick(); }, 1000);
        const plan = (stations) => stations.map((s) => s.id);
        """) == [("function", "plan")]
    assert qualnames("java", """
        class Dock {
            void watch() {
                Runnable r = new Runnable() { public void run() {} };
                Runnable q = () -> {};
            }
        }
        """) == [("class", "Dock"), ("method", "Dock.watch")]
    assert qualnames("go", """
        package dockd
        func serve() { go func() { work() }() }
        """) == [("function", "serve")]
    assert qualnames("rust", "fn run() { let f = |x: u32| x + 1; }") == [("function", "run")]
    assert qualnames("ruby", "def run\n  [1].each { |x| x }\nend\n") == [("function", "run")]


def test_named_inner_functions_are_units() -> None:
    assert ("function", "plan.score") in qualnames("javascript", """
        function plan() { function score() {} }
        """)
    assert ("function", "outer::inner") in qualnames("rust", """
        fn outer() { fn inner() {} }
        """)
    assert ("class", "Dock.watch.Probe") in qualnames("java", """
        class Dock { void watch() { class Probe {} } }
        """)


def test_signatures_stop_at_the_body() -> None:
    cases = [
        ("go", "package p\nfunc (l *Ledger) Post(c int) error {\n\treturn nil\n}\n",
         "func (l *Ledger) Post(c int) error"),
        ("rust", "pub fn price(&self, m: u32) -> u32 {\n    m\n}\n",
         "pub fn price(&self, m: u32) -> u32"),
        ("java",
         "class A {\n  @Override\n  public int f(int a) throws E {\n    return a;\n  }\n}\n",
         "@Override public int f(int a) throws E"),
        ("cpp", "template <typename T>\nT avg(const T *v,\n      int n) {\n  return T();\n}\n",
         "template <typename T> T avg(const T *v, int n)"),
        ("ruby", "def release(force: false)\n  unlock\nend\n", "def release(force: false)"),
        ("typescript", "export const f = (a: number): number => {\n  return a;\n};\n",
         "export const f = (a: number): number =>"),
    ]
    for language, source, signature in cases:
        first = units_of(language, source)[-1]
        assert first.signature == signature, language


def test_java_units_start_after_their_annotations() -> None:
    # the same rule as a Python unit starting at its def, after its decorators
    unit = unit_named("java", """
        class A {
            /** Doc. */
            @Override
            @SuppressWarnings("unchecked")
            public void f() {}
        }
        """, "A.f")
    assert unit.start_line == 6 and unit.code.lstrip().startswith("public void f()")
    assert unit.signature.startswith("@Override @SuppressWarnings")


def test_deleted_and_defaulted_members_are_not_units() -> None:
    assert qualnames("cpp", """
        struct Dock {
          Dock() = default;
          Dock(const Dock &) = delete;
          void lock() {}
        };
        """) == [("class", "Dock"), ("method", "Dock::lock")]


# -- doc text and summaries ------------------------------------------------------------------


def test_markers_and_stars_are_cleaned_and_tags_kept_out_of_the_summary() -> None:
    java = unit_named("java", """
        class Dock {
            /**
             * Release the bike, see {@link Latch#open}.
             *
             * @param force skip the lock check
             * @return true when released
             */
            boolean release(boolean force) { return true; }
        }
        """, "Dock.release")
    assert java.doc == ("Release the bike, see {@link Latch#open}.\n\n"
                        "@param force skip the lock check\n@return true when released")
    assert java.doc_summary == "Release the bike, see Latch#open."
    rust = unit_named("rust", """
        /// Price one ride.
        ///
        /// # Arguments
        ///
        /// * `minutes` - ride length
        fn price(minutes: u32) -> u32 { minutes }
        """, "price")
    assert "# Arguments" in rust.doc and rust.doc_summary == "Price one ride."
    doxygen = unit_named("cpp", """
        /**
         * @brief Decode one packet.
         * @param raw the bytes
         */
        int decode(const char *raw) { return 0; }
        """, "decode")
    assert doxygen.doc_summary == "Decode one packet." and "@param raw" in doxygen.doc
    ruby = unit_named("ruby", """
        # Release a bike.
        # @param force [Boolean]
        def release(force); end
        """, "release")
    assert ruby.doc_summary == "Release a bike."


# -- keyword entries: a member's doc comment leaves its class's entry with its body -------


@pytest.mark.parametrize(("language", "source"), [
    ("java", """\
        /** Where the vans park overnight. */
        public class Depot {
            private int capacity = 12;

            /**
             * Gives a van its bay, counted from the gate.
             * @param van the van
             */
            @Override
            public int park(Van van) {
                return bays.indexOf(van.plate) + WINDSHEAR;
            }

            // a note on leaving, not a doc: a blank line follows

            public void leave(Van van) {
                bays.remove(van.plate);
            }
        }
        """),
    ("ruby", """\
        # Where the vans park overnight.
        class Depot
          # Gives a van its bay, counted from the gate.
          def park(van)
            bays.index(van.plate) + WINDSHEAR
          end

          # a note on leaving, not a doc: a blank line follows

          def leave(van)
            bays.delete(van.plate)
          end
        end
        """),
])
def test_a_class_entry_keeps_member_signatures_not_their_docs_or_bodies(
        language: str, source: str) -> None:
    from codeseek.units import lexical_codes

    units = units_of(language, textwrap.dedent(source))
    codes = {u.qualname: code for u, code in zip(units, lexical_codes(units), strict=True)}
    depot = codes["Depot"]
    assert "park(" in depot and "leave(" in depot
    assert "WINDSHEAR" not in depot and "delete" not in depot and "remove" not in depot
    assert "counted from the gate" not in depot  # park's doc is park's
    assert "a note on leaving" in depot  # a comment that is no one's doc stays
    park = next(u for u in units if u.qualname.endswith("park"))
    assert park.doc.startswith("Gives a van its bay")
    assert "WINDSHEAR" in codes[park.qualname]


@pytest.mark.parametrize(("language", "source", "kept", "dropped"), [
    ("javascript", """\
        class Counter {
          #count = 0;
          /** Increments the count. */
          inc() { this.#count++; }
        }
        """, ["#count = 0;"], ["Increments the count", "this.#count++"]),
    ("java", """\
        class Depot {
            @Inject Gate gate;
            /** Opens the gate for a van. */
            public void open() { gate.lift(); }
        }
        """, ["@Inject Gate gate;"], ["Opens the gate", "gate.lift()"]),
    ("cpp", """\
        class Depot {
        #ifdef WITH_GATE
          /// Opens the gate for a van.
          int open() { return lift(); }
        #endif
          /// Doubles a bay number.
          template <typename T>
          T twice(T bay) { return bay + bay; }
        };
        """, ["#ifdef WITH_GATE", "#endif"],
     ["Opens the gate", "lift()", "Doubles a bay", "bay + bay"]),
])
def test_a_class_entry_drops_only_its_members_docs_and_bodies(
        language: str, source: str, kept: list[str], dropped: list[str]) -> None:
    from codeseek.units import lexical_codes

    units = units_of(language, textwrap.dedent(source))
    codes = {u.qualname: code for u, code in zip(units, lexical_codes(units), strict=True)}
    depot = codes.get("Depot", codes.get("Counter"))
    assert depot is not None, list(codes)
    assert [text for text in kept if text not in depot] == []  # fields, directives stay
    assert [text for text in dropped if text in depot] == []


def test_members_sharing_a_line_with_other_code_fold_cleanly() -> None:
    from codeseek.units import lexical_codes

    source = """\
        class Depot { park() {
            return lift(); }
          leave() {
            return lower();
          } refuel() {
            return pump();
          }
        }
        """
    units = units_of("javascript", textwrap.dedent(source))
    codes = {u.qualname: code for u, code in zip(units, lexical_codes(units), strict=True)}
    assert set(codes) == {"Depot", "Depot.park", "Depot.leave", "Depot.refuel"}
    assert [line.strip() for line in codes["Depot"].splitlines()] == [
        "class Depot { park()", "leave() refuel()", "}"]
    # a member's own entry starts at the member, not at the code before it on its line
    assert codes["Depot.park"].startswith("park() {")
    assert codes["Depot.refuel"].startswith("refuel() {")
