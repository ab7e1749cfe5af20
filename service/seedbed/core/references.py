"""Published sources that seedbed's rules, gains and checks rest on.

One registry so that every rationale, catalog entry and test cites a source the same way.
Each `Source` has a stable key (our own short identifiers such as ``"he-2015"``); callers
format it with `cite` (full form, for plan `references` and the catalog) or `short_cite`
(inline form, for rationale sentences), optionally with a location inside the source
("eq. 10", "sec. 4.1"). Locations that were recalled rather than read from the paper carry
"[from memory]" where they are written, never silently.

API:
    SOURCES: Mapping[str, Source]       all known sources by key
    source(key) -> Source               ValueError naming the known keys for an unknown key
    cite(key, where=None) -> str        'He, Zhang, Ren & Sun (2015), "Delving ...", ICCV, eq. 10'
    short_cite(key, where=None) -> str  'He et al. 2015, eq. 10'
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType


@dataclass(frozen=True)
class Source:
    key: str
    authors: str  # as usually cited: "He, Zhang, Ren & Sun"
    year: int
    title: str
    venue: str

    @property
    def lead_author(self) -> str:
        return self.authors.split(",")[0].split("&")[0].strip()

    @property
    def author_count(self) -> int:
        return self.authors.count(",") + self.authors.count("&") + 1

    def short(self) -> str:
        """'He et al. 2015', 'Glorot & Bengio 2010', 'Wichura 1988'."""
        who = self.authors if self.author_count <= 2 else f"{self.lead_author} et al."
        return f"{who} {self.year}"

    def full(self) -> str:
        return f'{self.authors} ({self.year}), "{self.title}", {self.venue}'


_ALL: tuple[Source, ...] = (
    # --- scale rules ---
    Source(
        "glorot-2010",
        "Glorot & Bengio",
        2010,
        "Understanding the difficulty of training deep feedforward neural networks",
        "AISTATS",
    ),
    Source(
        "he-2015",
        "He, Zhang, Ren & Sun",
        2015,
        "Delving Deep into Rectifiers: Surpassing Human-Level Performance on ImageNet "
        "Classification",
        "ICCV",
    ),
    Source(
        "lecun-1998",
        "LeCun, Bottou, Orr & Müller",
        1998,
        "Efficient BackProp",
        "Neural Networks: Tricks of the Trade, Springer",
    ),
    Source(
        "klambauer-2017",
        "Klambauer, Unterthiner, Mayr & Hochreiter",
        2017,
        "Self-Normalizing Neural Networks",
        "NeurIPS",
    ),
    Source(
        "saxe-2014",
        "Saxe, McClelland & Ganguli",
        2014,
        "Exact solutions to the nonlinear dynamics of learning in deep linear neural networks",
        "ICLR",
    ),
    Source(
        "mezzadri-2007",
        "Mezzadri",
        2007,
        "How to generate random matrices from the classical compact groups",
        "Notices of the AMS 54(5)",
    ),
    Source(
        "xiao-2018",
        "Xiao, Bahri, Sohl-Dickstein, Schoenholz & Pennington",
        2018,
        "Dynamical Isometry and a Mean Field Theory of CNNs",
        "ICML",
    ),
    Source(
        "le-2015",
        "Le, Jaitly & Hinton",
        2015,
        "A Simple Way to Initialize Recurrent Networks of Rectified Linear Units",
        "arXiv:1504.00941",
    ),
    Source(
        "gers-2000",
        "Gers, Schmidhuber & Cummins",
        2000,
        "Learning to Forget: Continual Prediction with LSTM",
        "Neural Computation",
    ),
    Source(
        "jozefowicz-2015",
        "Jozefowicz, Zaremba & Sutskever",
        2015,
        "An Empirical Exploration of Recurrent Network Architectures",
        "ICML",
    ),
    Source("martens-2010", "Martens", 2010, "Deep learning via Hessian-free optimization", "ICML"),
    Source(
        "lin-2017",
        "Lin, Goyal, Girshick, He & Dollár",
        2017,
        "Focal Loss for Dense Object Detection",
        "ICCV",
    ),
    # --- depth and width ---
    Source(
        "zhang-2019",
        "Zhang, Dauphin & Ma",
        2019,
        "Fixup Initialization: Residual Learning Without Normalization",
        "ICLR",
    ),
    Source(
        "de-2020",
        "De & Smith",
        2020,
        "Batch Normalization Biases Residual Blocks Towards the Identity Function in Deep Networks",
        "NeurIPS",
    ),
    Source(
        "bachlechner-2020",
        "Bachlechner, Majumder, Mao, Cottrell & McAuley",
        2020,
        "ReZero is All You Need: Fast Convergence at Large Depth",
        "arXiv:2003.04887",
    ),
    Source(
        "radford-2019",
        "Radford, Wu, Child, Luan, Amodei & Sutskever",
        2019,
        "Language Models are Unsupervised Multitask Learners",
        "OpenAI technical report",
    ),
    Source(
        "wang-2022",
        "Wang, Ma, Dong, Huang, Zhang & Wei",
        2022,
        "DeepNet: Scaling Transformers to 1,000 Layers",
        "arXiv:2203.00555",
    ),
    Source(
        "huang-2020",
        "Huang, Perez, Ba & Volkovs",
        2020,
        "Improving Transformer Optimization Through Better Initialization",
        "ICML",
    ),
    Source(
        "yang-2021",
        "Yang, Hu, Babuschkin, Sidor, Liu, Farhi, Ryder, Pachocki, Chen & Gao",
        2021,
        "Tensor Programs V: Tuning Large Neural Networks via Zero-Shot Hyperparameter Transfer",
        "arXiv:2203.03466",
    ),
    Source(
        "hanin-2018",
        "Hanin & Rolnick",
        2018,
        "How to Start Training: The Effect of Initialization and Architecture",
        "NeurIPS",
    ),
    # --- signal propagation ---
    Source(
        "poole-2016",
        "Poole, Lahiri, Raghu, Sohl-Dickstein & Ganguli",
        2016,
        "Exponential expressivity in deep neural networks through transient chaos",
        "NeurIPS",
    ),
    Source(
        "schoenholz-2017",
        "Schoenholz, Gilmer, Ganguli & Sohl-Dickstein",
        2017,
        "Deep Information Propagation",
        "ICLR",
    ),
    # --- data-dependent ---
    Source("mishkin-2016", "Mishkin & Matas", 2016, "All you need is a good init", "ICLR"),
    Source(
        "salimans-2016",
        "Salimans & Kingma",
        2016,
        "Weight Normalization: A Simple Reparameterization to Accelerate Training of Deep "
        "Neural Networks",
        "NeurIPS",
    ),
    # --- randomness and formats ---
    Source(
        "salmon-2011",
        "Salmon, Moraes, Dror & Shaw",
        2011,
        "Parallel Random Numbers: As Easy as 1, 2, 3",
        "SC'11",
    ),
    Source(
        "wichura-1988",
        "Wichura",
        1988,
        "Algorithm AS 241: The Percentage Points of the Normal Distribution",
        "Applied Statistics 37(3)",
    ),
    Source(
        "nep-19",
        "NumPy developers",
        2018,
        "NEP 19: Random number generator policy",
        "NumPy Enhancement Proposals",
    ),
    Source(
        "safetensors-format",
        "Hugging Face",
        2022,
        "safetensors format description",
        "safetensors documentation",
    ),
    Source("rfc-8246", "McManus", 2017, "HTTP Immutable Responses", "RFC 8246"),
    Source("rfc-9110", "Fielding, Nottingham & Reschke", 2022, "HTTP Semantics", "RFC 9110"),
    # --- the activation functions themselves ---
    Source(
        "nair-2010",
        "Nair & Hinton",
        2010,
        "Rectified Linear Units Improve Restricted Boltzmann Machines",
        "ICML",
    ),
    Source(
        "maas-2013",
        "Maas, Hannun & Ng",
        2013,
        "Rectifier Nonlinearities Improve Neural Network Acoustic Models",
        "ICML workshop",
    ),
    Source(
        "clevert-2016",
        "Clevert, Unterthiner & Hochreiter",
        2016,
        "Fast and Accurate Deep Network Learning by Exponential Linear Units (ELUs)",
        "ICLR",
    ),
    Source(
        "hendrycks-2016",
        "Hendrycks & Gimpel",
        2016,
        "Gaussian Error Linear Units (GELUs)",
        "arXiv:1606.08415",
    ),
    Source(
        "elfwing-2018",
        "Elfwing, Uchibe & Doya",
        2018,
        "Sigmoid-Weighted Linear Units for Neural Network Function Approximation in "
        "Reinforcement Learning",
        "Neural Networks 107",
    ),
    Source(
        "howard-2019",
        "Howard, Sandler, Chu, Chen, Chen, Tan, Wang, Zhu, Pang, Vasudevan, Le & Adam",
        2019,
        "Searching for MobileNetV3",
        "ICCV",
    ),
    Source(
        "dugas-2001",
        "Dugas, Bengio, Bélisle, Nadeau & Garcia",
        2001,
        "Incorporating Second-Order Functional Knowledge for Better Option Pricing",
        "NeurIPS",
    ),
)

SOURCES: Mapping[str, Source] = MappingProxyType({s.key: s for s in _ALL})


def source(key: str) -> Source:
    try:
        return SOURCES[key]
    except KeyError:
        raise ValueError(
            f"unknown source key {key!r}; known keys: {', '.join(sorted(SOURCES))}"
        ) from None


def cite(key: str, where: str | None = None) -> str:
    """Full citation, optionally with a location: '..., ICCV, eq. 10'."""
    text = source(key).full()
    return f"{text}, {where}" if where else text


def short_cite(key: str, where: str | None = None) -> str:
    """Inline citation for rationale sentences: 'He et al. 2015, eq. 10'."""
    text = source(key).short()
    return f"{text}, {where}" if where else text
