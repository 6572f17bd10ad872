"""A small HTML tree from the standard library's parser, for asserting on pages."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from html.parser import HTMLParser

_VOID = {
    "area",
    "base",
    "br",
    "col",
    "embed",
    "hr",
    "img",
    "input",
    "link",
    "meta",
    "source",
    "track",
    "wbr",
}


@dataclass
class Node:
    tag: str
    attrs: dict[str, str]
    children: list[Node] = field(default_factory=list)
    parts: list[str] = field(default_factory=list)  # text directly inside

    @property
    def text(self) -> str:
        return " ".join(" ".join(self._texts()).split())

    def _texts(self) -> Iterator[str]:
        yield from self.parts
        for c in self.children:
            yield from c._texts()

    def walk(self) -> Iterator[Node]:
        yield self
        for c in self.children:
            yield from c.walk()

    def find_all(self, pred: Callable[[Node], bool]) -> list[Node]:
        return [n for n in self.walk() if pred(n)]

    def by(self, tag: str | None = None, **attrs: str) -> list[Node]:
        def ok(n: Node) -> bool:
            if tag is not None and n.tag != tag:
                return False
            return all(n.attrs.get(k.replace("_", "-")) == v for k, v in attrs.items())

        return self.find_all(ok)


class _Builder(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.root = Node("#root", {})
        self.stack = [self.root]

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = Node(tag, {k: v or "" for k, v in attrs})
        self.stack[-1].children.append(node)
        if tag not in _VOID:
            self.stack.append(node)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.stack[-1].children.append(Node(tag, {k: v or "" for k, v in attrs}))

    def handle_endtag(self, tag: str) -> None:
        for i in range(len(self.stack) - 1, 0, -1):
            if self.stack[i].tag == tag:
                del self.stack[i:]
                return

    def handle_data(self, data: str) -> None:
        self.stack[-1].parts.append(data)


def parse(html: str) -> Node:
    b = _Builder()
    b.feed(html)
    b.close()
    return b.root
