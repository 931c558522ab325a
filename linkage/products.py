"""Which products a model was trained on, and the store's lots of other products, in words (no pandas).

A model keeps its training lots' products (``training["products"]``) and, since the user test of several products
in one store, how many lots of each (``training["product_lots"]``) and how many had no product name
(``training["lots_without_product"]``). A model of one product is the default scope of the commands that read the
store's lots for it (``report``, ``plan``, ``watch``, ``retrain``); a model trained on several is said to be so
(``train``, ``predict``), and lots of other products left out are said to be left out.
"""

from __future__ import annotations

#: a product name and its number of lots; None for lots without a product name (a count None: not recorded)
Count = tuple[str | None, int | None]


def _lots(n: int | None) -> str:
    return "" if n is None else f" ({n} lot{'' if n == 1 else 's'})"


def training_counts(training: dict) -> list[Count]:
    """The products of a model's training lots with their lot counts, lots without a product last (as None);
    a model trained before the counts were kept gives its product names with None counts."""
    counts = training.get("product_lots")
    if counts is None:
        return [(str(p), None) for p in training.get("products") or []]
    out: list[Count] = [(str(p), int(n)) for p, n in counts.items()]
    if training.get("lots_without_product"):
        out.append((None, int(training["lots_without_product"])))
    return out


def one_product(training: dict) -> str | None:
    """The one product name of a model's training lots; None when they name several, or none. Lots without a
    product name beside those of one product leave it that product's model (the commands then read that
    product's lots, and ``train`` and ``predict`` say what it was trained on)."""
    products = training.get("products") or []
    return str(products[0]) if len(products) == 1 else None


def chain_counts(chain) -> list[Count]:
    """:func:`training_counts` of a fitted chain (its ``training``) or of a model's numbers
    (:class:`linkage.models.lean.LeanChain`: ``products``, ``product_lots``, ``lots_without_product``)."""
    training = getattr(chain, "training", None)
    if isinstance(training, dict):
        return training_counts(training)
    record = {"products": list(getattr(chain, "products", None) or [])}
    if getattr(chain, "product_lots", None) is not None:
        record["product_lots"] = dict(chain.product_lots)
        record["lots_without_product"] = int(getattr(chain, "lots_without_product", 0) or 0)
    return training_counts(record)


def is_mixed(counts: list[Count]) -> bool:
    """Lots of more than one product, or of a product and lots without one."""
    return len(counts) > 1


def trained_on_text(counts: list[Count]) -> str:
    """'trained on 2 products: 'A' (48 lots), 'B' (8 lots), and 4 lots with no product'."""
    named = [(p, n) for p, n in counts if p is not None]
    unnamed = [n for p, n in counts if p is None]
    text = (f"trained on {len(named)} product{'' if len(named) == 1 else 's'}: "
            + ", ".join(f"{p!r}{_lots(n)}" for p, n in named)) if named else "trained on lots with no product"
    if named and unnamed:
        text += f", and {unnamed[0]} lot{'' if unnamed[0] == 1 else 's'} with no product"
    return text


def mixed_text(products: list[dict]) -> str:
    """'mixed: trained on 2 products: 'A' (48 lots), 'B' (8 lots)': the mark of a model of several products
    where it is listed (``linkage models``, ``watch``); ``products`` as the JSON keys give them (``product``,
    ``n_lots``)."""
    return "mixed: " + trained_on_text([(p.get("product"), p.get("n_lots")) for p in products])


def train_note(counts: list[Count]) -> str | None:
    """The note of ``train`` on a model of several products (None for one): what it was trained on, and how to
    train a model of one."""
    if not is_mixed(counts):
        return None
    return (f"{trained_on_text(counts)}; one model for all of them. For a model of one product: "
            "linkage train --product NAME")


def counts_text(counts: list[Count]) -> str:
    """"'NP-9 50 mg': 8, no product: 4": products and their lots, lots without a product name as such."""
    return ", ".join(f"{p!r}: {n}" if p is not None else f"no product: {n}" for p, n in counts)


def others_text(counts: list[Count]) -> str:
    """'12 lots of other products ('NP-9 50 mg': 8, no product: 4)'."""
    total = sum(n or 0 for _, n in counts)
    return f"{total} lot{'' if total == 1 else 's'} of other products ({counts_text(counts)})"


def other_counts(store_counts: dict, product: str | None) -> list[Count]:
    """The store's lot counts by product (:meth:`linkage.store.LotStore.product_counts`) other than ``product``'s;
    none when ``product`` is None (every lot is in scope)."""
    if product is None:
        return []
    named = sorted((p, n) for p, n in store_counts.items() if p is not None and p != product)
    return named + ([(None, store_counts[None])] if store_counts.get(None) else [])
