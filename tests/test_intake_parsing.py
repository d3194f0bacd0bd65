"""Mail as input: messages, mbox, Maildir, .eml folders and CSV turned into documents.

The standard's own examples are the reference: RFC 5322 Appendix A (the example messages, with
the header values the RFC says they carry) and RFC 2047 section 8 (encoded words and how white
space between them is displayed). The examples are copied in below from the RFC text; the
other messages are invented for these tests.
"""

from __future__ import annotations

import base64
import io
import json
import mailbox
import sys
from datetime import UTC, datetime, timedelta, timezone
from email.message import EmailMessage
from pathlib import Path

import numpy as np
import pytest

from intake.compose import MailDraft, split_subject, write_maildir, write_mbox
from intake.html_text import html_to_text
from intake.message import MessageError, parse_message
from intake.quotes import strip_replies
from intake.sources import SourceError, detect_format, read_documents
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes
from service.cli import main
from service.demo_data import default_days, generate_day


def crlf(text: str) -> bytes:
    """An RFC text example as wire bytes (CRLF line ends, as RFC 5322 section 2.1 says)."""
    return text.lstrip("\n").replace("\n", "\r\n").encode("latin-1")


# -- RFC 5322 Appendix A ---------------------------------------------------------------------

A_1_1 = crlf("""
From: John Doe <jdoe@machine.example>
To: Mary Smith <mary@example.net>
Subject: Saying Hello
Date: Fri, 21 Nov 1997 09:55:06 -0600
Message-ID: <1234@local.machine.example>

This is a message just to say hello.
So, "Hello".
""")

A_1_2 = crlf("""
From: "Joe Q. Public" <john.q.public@example.com>
To: Mary Smith <mary@x.test>, jdoe@example.org, Who? <one@y.test>
Cc: <boss@nil.test>, "Giant; \\"Big\\" Box" <sysservices@example.net>
Date: Tue, 1 Jul 2003 10:52:37 +0200
Message-ID: <5678.21-Nov-1997@example.com>

Hi everyone.
""")

A_2_REPLY = crlf("""
From: Mary Smith <mary@example.net>
To: John Doe <jdoe@machine.example>
Reply-To: "Mary Smith: Personal Account" <smith@home.example>
Subject: Re: Saying Hello
Date: Fri, 21 Nov 1997 10:01:10 -0600
Message-ID: <3456@example.net>
In-Reply-To: <1234@local.machine.example>
References: <1234@local.machine.example>

This is a reply to your hello.
""")

A_3_RESENT = crlf("""
Resent-From: Mary Smith <mary@example.net>
Resent-To: Jane Brown <j-brown@other.example>
Resent-Date: Mon, 24 Nov 1997 14:22:01 -0800
Resent-Message-ID: <78910@example.net>
From: John Doe <jdoe@machine.example>
To: Mary Smith <mary@example.net>
Subject: Saying Hello
Date: Fri, 21 Nov 1997 09:55:06 -0600
Message-ID: <1234@local.machine.example>

This is a message just to say hello.
So, "Hello".
""")

A_4_TRACE = crlf("""
Received: from x.y.test
   by example.net
   via TCP
   with ESMTP
   id ABC12345
   for <mary@example.net>;  21 Nov 1997 10:05:43 -0600
Received: from node.example by x.y.test; 21 Nov 1997 10:01:22 -0600
From: John Doe <jdoe@node.example>
To: Mary Smith <mary@example.net>
Subject: Saying Hello
Date: Fri, 21 Nov 1997 09:55:06 -0600
Message-ID: <1234@local.node.example>

This is a message just to say hello.
So, "Hello".
""")

A_5_ODDITIES = crlf("""
From: Pete(A nice \\) chap) <pete(his account)@silly.test(his host)>
To:A Group(Some people)
     :Chris Jones <c@(Chris's host.)public.example>,
         joe@example.org,
  John <jdoe@one.test> (my dear friend); (the end of the group)
Cc:(Empty list)(start)Hidden recipients  :(nobody(that I know))  ;
Date: Thu,
      13
        Feb
          1969
      23:32
               -0330 (Newfoundland Time)
Message-ID:              <testabcd.1234@silly.test>

Testing.
""")

CST = timezone(timedelta(hours=-6))


def test_rfc5322_a_1_1_simple_message() -> None:
    mail = parse_message(A_1_1)
    # RFC 5322 A.1.1: Message-ID <1234@local.machine.example>, Date Fri, 21 Nov 1997 09:55:06 -0600
    assert mail.id == "1234@local.machine.example"
    assert mail.received == datetime(1997, 11, 21, 9, 55, 6, tzinfo=CST).timestamp()
    assert mail.metadata == {"sender_domain": "machine.example"}
    assert mail.text == 'Saying Hello\n\nThis is a message just to say hello.\nSo, "Hello".'


def test_rfc5322_a_1_2_quoted_display_names() -> None:
    mail = parse_message(A_1_2)
    # RFC 5322 A.1.2: From "Joe Q. Public" <john.q.public@example.com>, +0200
    assert mail.id == "5678.21-Nov-1997@example.com"
    assert mail.metadata["sender_domain"] == "example.com"
    tz = timezone(timedelta(hours=2))
    assert mail.received == datetime(2003, 7, 1, 10, 52, 37, tzinfo=tz).timestamp()
    assert mail.text == "Hi everyone."  # no Subject in the example: the body alone


def test_rfc5322_a_2_reply_a_3_resent_a_4_trace() -> None:
    reply = parse_message(A_2_REPLY)
    # RFC 5322 A.2: the reply's own Message-ID, not its In-Reply-To
    assert reply.id == "3456@example.net"
    assert reply.text == "Re: Saying Hello\n\nThis is a reply to your hello."
    resent = parse_message(A_3_RESENT)
    # RFC 5322 A.3: Resent-* fields do not replace the originator fields
    assert resent.id == "1234@local.machine.example"
    assert resent.metadata["sender_domain"] == "machine.example"
    trace = parse_message(A_4_TRACE)
    # RFC 5322 A.4: the Date field, not the Received trace times, is the message's time
    assert trace.received == datetime(1997, 11, 21, 9, 55, 6, tzinfo=CST).timestamp()
    assert trace.id == "1234@local.node.example"
    assert detect_format_of(A_3_RESENT) == "eml" == detect_format_of(A_4_TRACE)


def test_rfc5322_a_5_comments_and_folding_white_space() -> None:
    mail = parse_message(A_5_ODDITIES)
    # RFC 5322 A.5: the address is pete@silly.test once comments are removed; the date is
    # 13 Feb 1969 23:32 -0330 folded over six lines
    assert mail.metadata["sender_domain"] == "silly.test"
    assert mail.id == "testabcd.1234@silly.test"
    tz = timezone(-timedelta(hours=3, minutes=30))
    assert mail.received == datetime(1969, 2, 13, 23, 32, tzinfo=tz).timestamp()
    assert mail.text == "Testing."


def detect_format_of(raw: bytes, tmp: Path | None = None) -> str:
    from intake.sources import detect_bytes

    return detect_bytes(raw)


# -- RFC 2047 section 8 ----------------------------------------------------------------------

RFC2047_HEADERS = crlf("""
From: =?US-ASCII?Q?Keith_Moore?= <moore@cs.utk.edu>
To: =?ISO-8859-1?Q?Keld_J=F8rn_Simonsen?= <keld@dkuug.dk>
CC: =?ISO-8859-1?Q?Andr=E9?= Pirard <PIRARD@vm1.ulg.ac.be>
Subject: =?ISO-8859-1?B?SWYgeW91IGNhbiByZWFkIHRoaXMgeW8=?=
    =?ISO-8859-2?B?dSB1bmRlcnN0YW5kIHRoZSBleGFtcGxlLg==?=

""")


def test_rfc2047_section_8_example_message() -> None:
    mail = parse_message(RFC2047_HEADERS)
    # RFC 2047 section 8: the two B-encoded words of the Subject (ISO-8859-1 and -2) decode to
    # "If you can read this you understand the example."
    assert mail.text == "If you can read this you understand the example."
    assert mail.metadata["sender_domain"] == "cs.utk.edu"
    assert mail.id.startswith("sha256:")  # the example has no Message-ID


@pytest.mark.parametrize(
    ("encoded", "displayed"),
    [
        # RFC 2047 section 8, the table of encoded text and how it is displayed
        (b"(=?ISO-8859-1?Q?a?=)", "(a)"),
        (b"(=?ISO-8859-1?Q?a?= b)", "(a b)"),
        (b"(=?ISO-8859-1?Q?a?= =?ISO-8859-1?Q?b?=)", "(ab)"),
        (b"(=?ISO-8859-1?Q?a?=  =?ISO-8859-1?Q?b?=)", "(ab)"),
        (b"(=?ISO-8859-1?Q?a?=\r\n    =?ISO-8859-1?Q?b?=)", "(ab)"),
        (b"(=?ISO-8859-1?Q?a_b?=)", "(a b)"),
        (b"(=?ISO-8859-1?Q?a?= =?ISO-8859-2?Q?_b?=)", "(a b)"),
    ],
)
def test_rfc2047_section_8_white_space_between_encoded_words(encoded, displayed) -> None:
    mail = parse_message(b"Subject: " + encoded + b"\r\n\r\nbody\r\n")
    assert mail.subject == displayed


# -- invented messages -----------------------------------------------------------------------


def test_multipart_alternative_prefers_plain_and_counts_attachments() -> None:
    message = EmailMessage()
    message["From"] = "Isla <isla@example.invalid>"
    message["Subject"] = "Lost rucksack"
    message["Message-ID"] = "<lost-1@example.invalid>"
    message.set_content("I left a blue rucksack on the MV Gullwing.\n")
    message.add_alternative("<p>HTML version: <b>rucksack</b> lost</p>", subtype="html")
    message.add_attachment(b"\x89PNG fake", maintype="image", subtype="png", filename="bag.png")
    message.add_attachment("a text file", filename="notes.txt")
    mail = parse_message(message.as_bytes())
    assert mail.text == "Lost rucksack\n\nI left a blue rucksack on the MV Gullwing."
    assert "HTML version" not in mail.text and "a text file" not in mail.text
    assert mail.attachments_skipped == 2
    assert mail.metadata == {"sender_domain": "example.invalid", "attachments_skipped": 2}


def test_html_only_message_becomes_text_without_markup_or_quotes() -> None:
    html = (
        "<html><head><style>p {color: red}</style><title>x</title></head><body>"
        "<p>Is the 08:15&nbsp;sailing on&nbsp;time?</p><div>Caf&eacute; open &amp; warm?</div>"
        '<div class="gmail_quote">On Monday Ferries wrote:<blockquote>Old words here'
        "</blockquote></div><script>alert(1)</script></body></html>"
    )
    message = EmailMessage()
    message["Subject"] = "Sailing"
    message.set_content(html, subtype="html")
    mail = parse_message(message.as_bytes())
    assert mail.text == "Sailing\n\nIs the 08:15 sailing on time?\nCafé open & warm?"
    kept = parse_message(message.as_bytes(), strip_quotes=False)
    assert "Old words here" in kept.text and "alert" not in kept.text


def test_quoted_printable_base64_and_latin1_bodies() -> None:
    qp = crlf("""
Subject: =?utf-8?q?Caf=C3=A9_on_board?=
Content-Type: text/plain; charset=utf-8
Content-Transfer-Encoding: quoted-printable

Is the caf=C3=A9 open on the late sailing? A very long line that is soft=
 broken here.
""")
    assert parse_message(qp).text == (
        "Café on board\n\nIs the café open on the late sailing? A very long line that is soft "
        "broken here."
    )
    body = base64.b64encode("Hund an Bord, geht das? Größe mittel.".encode()).decode()
    b64 = crlf(f"""
Subject: Pets
Content-Type: text/plain; charset="utf-8"
Content-Transfer-Encoding: base64

{body}
""")
    assert parse_message(b64).text == "Pets\n\nHund an Bord, geht das? Größe mittel."
    latin1 = (
        b"Subject: Tarif\r\nContent-Type: text/plain; charset=iso-8859-1\r\n"
        b"Content-Transfer-Encoding: 8bit\r\n\r\n"
        b"Le billet co\xfbte trop cher, d\xe9j\xe0 pay\xe9.\r\n"
    )
    assert parse_message(latin1).text == "Tarif\n\nLe billet coûte trop cher, déjà payé."


def test_quoted_reply_and_signature_are_cut_by_default() -> None:
    body = (
        "Yes, the 18:10 suits us.\n\nOn Tue, 3 Jun 2025, Saltgrass Ferries wrote:\n"
        "> Would a later sailing suit you?\n> Regards\n\n-- \nAileen\nPhone 0000\n"
    )
    assert strip_replies(body) == "Yes, the 18:10 suits us."
    outlook = "Fine.\n\n-----Original Message-----\nFrom: x\nSent: y\nold text"
    assert strip_replies(outlook) == "Fine."
    header_block = "Fine.\n\nFrom: Ferries <a@b.invalid>\nSent: Monday\nSubject: old\nold"
    assert strip_replies(header_block) == "Fine."
    message = crlf("Subject: Re: later sailing\n\n" + body)
    assert parse_message(message).text == "Re: later sailing\n\nYes, the 18:10 suits us."
    kept = parse_message(message, strip_quotes=False).text
    assert "Would a later sailing" in kept and "Phone 0000" in kept


@pytest.mark.parametrize(
    ("raw", "reason"),
    [
        (b"", "empty message"),
        (b"\x00\x01\x02 binary junk without any header\r\n", "header"),
        (b"Subject:\r\n\r\n   \r\n", "no text"),
        (b"Subject: x\r\nContent-Type: text/plain; charset=x-no-such\r\n\r\nhi\r\n", "charset"),
    ],
)
def test_broken_messages_are_refused_with_a_reason(raw, reason) -> None:
    with pytest.raises(MessageError, match=reason):
        parse_message(raw)


def test_html_to_text_blocks_and_entities() -> None:
    assert html_to_text("<ul><li>one</li><li>two &lt;3</li></ul>") == "one\ntwo <3"


# -- sources: files, folders, detection, problems ----------------------------------------------


def _drafts(n: int = 5) -> list[MailDraft]:
    return [
        MailDraft(f"m{i}@ferry.invalid", f"Message {i}. Body words {i} here.", 1.7e9 + i)
        for i in range(n)
    ]


def test_mbox_with_a_broken_message_reports_its_position(tmp_path: Path) -> None:
    path = tmp_path / "inbox.mbox"
    write_mbox(path, _drafts(4))
    box = mailbox.mbox(path)
    box.add(mailbox.mboxMessage(b"Subject:\n\n\n"))  # fifth: nothing to read
    box.add(mailbox.mboxMessage(_msg_bytes("m9@ferry.invalid", "Last one. Words.")))
    box.flush()
    box.close()
    assert detect_format(path) == "mbox"
    batch = read_documents(path)
    assert batch.format == "mbox" and batch.unit == "message"
    assert batch.ids == [f"m{i}@ferry.invalid" for i in range(4)] + ["m9@ferry.invalid"]
    assert [str(p) for p in batch.problems] == [
        "message 5: no text: the subject and the body are empty"
    ]
    assert batch.documents[0].text == "Message 0.\n\nBody words 0 here."
    assert batch.documents[0].received == 1.7e9


def _msg_bytes(message_id: str, text: str) -> bytes:
    subject, body = split_subject(text)
    return crlf(f"Message-ID: <{message_id}>\nSubject: {subject}\n\n{body}\n")


def test_maildir_and_eml_folder_and_single_file(tmp_path: Path) -> None:
    write_maildir(tmp_path / "md", _drafts(3))
    assert detect_format(tmp_path / "md") == "maildir"
    assert sorted(read_documents(tmp_path / "md").ids) == [f"m{i}@ferry.invalid" for i in range(3)]
    folder = tmp_path / "eml"
    folder.mkdir()
    for i in range(3):
        (folder / f"{i:02d}.eml").write_bytes(_msg_bytes(f"e{i}@x.invalid", f"Hello {i}. Yes."))
    (folder / "readme.txt").write_text("not mail, not read")
    assert detect_format(folder) == "eml"
    batch = read_documents(folder)
    assert batch.ids == ["e0@x.invalid", "e1@x.invalid", "e2@x.invalid"]
    assert batch.documents[1].position == "file 01.eml"
    single = read_documents(folder / "02.eml")
    assert single.ids == ["e2@x.invalid"]
    (tmp_path / "empty").mkdir()
    with pytest.raises(SourceError, match=r"no \.eml files"):
        read_documents(tmp_path / "empty")


def test_csv_with_text_subject_and_id_columns(tmp_path: Path) -> None:
    path = tmp_path / "inbox.csv"
    path.write_text(
        'id,subject,body,channel\nc1,Refund,"I want my money back, please",web\n'
        'c2,,"Ferry late again",phone\nc3,,,web\nc4,x\n',
        encoding="utf-8",
    )
    assert detect_format(path) == "csv"
    batch = read_documents(path)
    assert batch.ids == ["c1", "c2"]
    assert batch.documents[0].text == "Refund\n\nI want my money back, please"
    assert batch.documents[0].metadata == {"channel": "web"}
    assert [p.position for p in batch.problems] == ["line 4", "line 5"]


def test_detection_refuses_what_it_cannot_tell_and_format_forces(tmp_path: Path) -> None:
    path = tmp_path / "notes.txt"
    path.write_text("just some words\nand more words\n")
    with pytest.raises(SourceError, match="--format"):
        read_documents(path)
    path.write_text('{"id": "a", "text": "ferry"}\n')
    assert read_documents(path).format == "jsonl"
    with pytest.raises(SourceError, match="unknown format"):
        read_documents(path, format="pdf")
    eml = tmp_path / "one"
    eml.write_bytes(A_1_1)
    assert read_documents(eml, format="eml").ids == ["1234@local.machine.example"]


def test_standard_input_mbox(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    path = tmp_path / "in.mbox"
    write_mbox(path, _drafts(2))

    class FakeStdin:
        buffer = io.BytesIO(path.read_bytes())

    monkeypatch.setattr(sys, "stdin", FakeStdin)
    assert read_documents("-").ids == ["m0@ferry.invalid", "m1@ferry.invalid"]


# -- command line ----------------------------------------------------------------------------


def _ferry_corpus() -> list[tuple[str, str]]:
    messages = [m for plan in default_days(0.15)[:3] for m in generate_day(plan, 3)]
    return [(f"{m.id}@ferry.invalid", m.text) for m in messages]


def test_same_corpus_as_jsonl_and_mbox_routes_the_same(tmp_path: Path) -> None:
    """Quality: the invented ferry inbox as JSON lines and as an mbox (subject = the text's
    first sentence) gives the same model and the same routing."""
    corpus = _ferry_corpus()
    jsonl = tmp_path / "inbox.jsonl"
    with jsonl.open("w") as handle:
        for doc_id, text in corpus:
            subject, body = split_subject(text)
            handle.write(json.dumps({"id": doc_id, "text": f"{subject}\n{body}"}) + "\n")
    mbox = tmp_path / "inbox.mbox"
    write_mbox(mbox, [MailDraft(i, t, 1.7e9 + n) for n, (i, t) in enumerate(corpus)])
    out = {}
    for name, path in (("jsonl", jsonl), ("mbox", mbox)):
        model = tmp_path / f"{name}.model"
        args = ["fit", str(path), "-k", "8", "--out", str(model), "--n-restarts", "2"]
        assert main(args) == 0
        routed = tmp_path / f"{name}.routed"
        assert main(["route", str(jsonl), "--model-file", str(model), "--out", str(routed)]) == 0
        out[name] = [json.loads(line) for line in routed.read_text().splitlines()]
        state = state_from_bytes(model.read_bytes())
        out[name + "-mbox"] = route_texts(state, read_documents(mbox).texts)
    assert [r["id"] for r in out["mbox"]] == [doc_id for doc_id, _ in corpus]
    assert [r["group"] for r in out["jsonl"]] == [r["group"] for r in out["mbox"]]

    def by_group(rows: list[dict]) -> list[list[float]]:
        return [[p["probability"] for p in sorted(r["posterior"], key=lambda p: p["group"])]
                for r in rows]  # fmt: skip

    np.testing.assert_allclose(by_group(out["jsonl"]), by_group(out["mbox"]), atol=1e-12)
    np.testing.assert_array_equal(out["jsonl-mbox"].group, out["mbox-mbox"].group)


def test_cli_fit_on_mbox_skips_broken_messages_or_refuses_with_strict(tmp_path, capsys) -> None:
    corpus = _ferry_corpus()[:120]
    mbox = tmp_path / "inbox.mbox"
    write_mbox(mbox, [MailDraft(i, t, 1.7e9) for i, t in corpus])
    box = mailbox.mbox(mbox)
    box.add(mailbox.mboxMessage(b"Subject: x\nContent-Type: text/plain; charset=nope\n\nhi\n"))
    box.flush()
    box.close()
    model = tmp_path / "m.model"
    assert main(["fit", str(mbox), "-k", "4", "--out", str(model), "--n-restarts", "1"]) == 0
    err = capsys.readouterr().err
    assert f"message {len(corpus) + 1}: unknown charset 'nope'" in err
    assert "skipped 1 unreadable message(s)" in err
    assert state_from_bytes(model.read_bytes()).documents_learned == len(corpus)
    strict = tmp_path / "strict.model"
    args = ["fit", str(mbox), "-k", "4", "--out", str(strict), "--strict"]
    assert main(args) == 2
    assert "--strict given, nothing done" in capsys.readouterr().err
    assert not strict.exists()
    jsonl_forced = ["fit", str(mbox), "-k", "4", "--out", str(strict), "--format", "jsonl"]
    assert main(jsonl_forced) == 2  # an mbox forced to be JSON lines has no valid line
    assert not strict.exists()


def test_cli_keep_quotes_switch(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "eml"
    folder.mkdir()
    for i in range(12):
        body = f"Ferry ticket question {i}\n\nOn Monday X wrote:\n> quotedword{i}\n"
        (folder / f"{i}.eml").write_bytes(crlf(f"Message-ID: <q{i}@x>\nSubject: s\n\n{body}"))
    for flag, expect in (([], False), (["--keep-quotes"], True)):
        model = tmp_path / f"q{len(flag)}.model"
        args = ["fit", str(folder), "-k", "2", "--out", str(model), "--n-restarts", "1", *flag]
        assert main(args) == 0
        state = state_from_bytes(model.read_bytes())
        assert (state.vocabulary.lookup("quotedword3") >= 0) is expect


def test_naive_date_is_utc() -> None:
    mail = parse_message(b"Subject: s\r\nDate: Fri, 21 Nov 1997 09:55:06 -0000\r\n\r\nx\r\n")
    assert mail.received == datetime(1997, 11, 21, 9, 55, 6, tzinfo=UTC).timestamp()


def test_demo_writes_the_invented_inbox_as_mbox_and_maildir_in_the_same_order(
    tmp_path: Path,
) -> None:
    from service.demo_data import INVENTED_NOTICE, write_demo_mail

    mbox, maildir = write_demo_mail(tmp_path, scale=0.05, seed=2)
    from_mbox, from_maildir = read_documents(mbox), read_documents(maildir)
    assert from_mbox.format == "mbox" and from_maildir.format == "maildir"
    assert len(from_mbox.ids) > 30 and not from_mbox.problems
    # Maildir keys compared as text put "Q10" before "Q2": delivery order needs numbers
    assert from_maildir.ids == from_mbox.ids
    assert from_maildir.texts == from_mbox.texts
    first = mailbox.mbox(mbox)
    assert next(iter(first))["X-Invented-Data"] == INVENTED_NOTICE
    first.close()
    times = [d.received for d in from_mbox.documents]
    assert times == sorted(times)


def test_maildir_order_compares_the_numbers_in_its_file_names(tmp_path: Path) -> None:
    # Python's mailbox names deliveries "<s>.M<us>P<pid>Q<n>.<host>": as text, M10 < M9
    box = tmp_path / "md"
    for sub in ("cur", "new", "tmp"):
        (box / sub).mkdir(parents=True)
    names = ["1700000000.M9P1Q1.h", "1700000000.M10P1Q2.h", "1700000000.M100P1Q3.h"]
    names += ["1700000001.M5P1Q10.h"]
    for i, name in enumerate(names):
        (box / "new" / name).write_bytes(_msg_bytes(f"o{i}@x.invalid", f"Order {i}. Text."))
    assert read_documents(box).ids == [f"o{i}@x.invalid" for i in range(4)]
