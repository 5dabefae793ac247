"""The building blocks of the report's sections (paragraphs, tables, figures ...), shared by every section
module so that none imports another."""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import pandas as pd


# -- blocks -------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Paragraph:
    text: str


@dataclass(frozen=True)
class Bullets:
    items: tuple[str, ...]


@dataclass(frozen=True)
class Table:
    frame: pd.DataFrame
    caption: str = ""


@dataclass(frozen=True)
class Figure:
    name: str
    png: bytes
    caption: str


@dataclass(frozen=True)
class Code:
    text: str


@dataclass(frozen=True)
class Callout:
    text: str


@dataclass
class Section:
    title: str
    blocks: list = field(default_factory=list)

    @property
    def anchor(self) -> str:
        return re.sub(r"[^a-z0-9]+", "-", self.title.lower()).strip("-")


