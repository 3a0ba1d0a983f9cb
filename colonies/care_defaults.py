"""Default species care profiles shipped with Vermilog, each value with its source.

Tags as in the project's reference list: a value from a published method is cited; a value that is
a lab choice says "lab setting"; a value recalled but not checked against the document says
"from memory". Where no published value exists the profile's notes say so. Labs should review
these against their own standard operating procedures and local animal-care rules.
"""

LAB_SETTING = "lab setting (no published value found; review locally)"
EU_2016_266 = "EU Regulation 2016/266, culture-method appendix for oligochaetes (summarising US EPA 2000 and ASTM)"
OECD_225 = "OECD Test Guideline 225 (2007), test conditions and validity criteria"
EPA_AMMONIA = "US EPA 2013 aquatic-life ammonia criteria (EPA 822-R-13-001): chronic 1.9 mg TAN-N/L at pH 7, 20 °C"
PLANARIAN = "Cebrià & Newmark 2005 (1x Montjuïc salts recipe) as used in Thommen et al. 2019, eLife 8:e38187"
PLATYNEREIS = "Schenk et al. 2019, eLife 8:e41556; Veraszto et al. 2018, eLife (culture methods sections)"

DEFAULT_PROFILES = [
    {
        "scientific_name": "Lumbriculus variegatus",
        "common_name": "California blackworm",
        "habitat": "freshwater",
        "check_interval_hours": 24,
        "feeding_interval_days": 3,
        "water_change_interval_days": 1,
        "water_change_fraction": 0.5,
        "census_interval_days": 14,
        "max_density_per_l": 2000,
        "reserve_min_animals": 500,
        "targets": [
            # (parameter, low, high, source)
            ("temp_c", 21.0, 25.0, f"{EU_2016_266}: cultures at 23 °C; the ±2 °C band is a lab setting"),
            ("ph", 6.0, 9.0, f"{OECD_225}: pH 6-9 (from memory; verify against the guideline)"),
            ("do_pct_sat", 30.0, None, f"{OECD_225}: dissolved oxygen not below 30 % of air saturation "
                                       "(from memory; verify against the guideline)"),
            ("tan_mg_l", None, 1.9, f"{EPA_AMMONIA}; a conservative alarm level, not a worm LC50"),
        ],
        "sources": {
            "temperature": f"{EU_2016_266}: 23 °C",
            "light": f"{EU_2016_266}: 16 h light : 8 h dark at 100-1000 lx",
            "water_change_interval_days": f"{EU_2016_266}: water renewed daily (or flow-through)",
            "water_change_fraction": LAB_SETTING,
            "feeding_interval_days": f"{EU_2016_266}: fed 3 times a week, so at most 3 days apart",
            "census_interval_days": f"lab setting informed by {EU_2016_266}: numbers double in about 10-14 days",
            "reserve_min_animals": f"{EU_2016_266}: cultures are started with 500-1000 animals",
            "max_density_per_l": LAB_SETTING,
            "check_interval_hours": "common practice: one check a day",
            "substrate": f"{EU_2016_266}: shredded unbleached paper towel",
        },
        "notes": (
            "Freshwater oligochaete used in sediment toxicity and bioaccumulation tests. No published "
            "maximum stocking density or nitrite threshold was found; those are lab settings. "
            "Starting size and doubling time after the EU 2016/266 culture appendix."
        ),
    },
    {
        "scientific_name": "Schmidtea mediterranea",
        "common_name": "Freshwater planarian",
        "habitat": "freshwater",
        "check_interval_hours": 24,
        "feeding_interval_days": 7,
        "water_change_interval_days": 7,
        "water_change_fraction": 1.0,
        "census_interval_days": 14,
        "max_density_per_l": 200,
        "reserve_min_animals": 50,
        "targets": [
            ("temp_c", 19.0, 21.0, f"{PLANARIAN}: 20 °C; the ±1 °C band is a lab setting"),
            # Hardness computed from the recipe: Ca 1.0 mM = 40.08 mg/L, Mg 1.1 mM = 26.74 mg/L;
            # Standard Methods 2340 B: 2.497 x 40.08 + 4.118 x 26.74 = 210 mg/L as CaCO3.
            ("hardness_mg_l", 180.0, 240.0, f"computed from {PLANARIAN}: about 210 mg/L as CaCO3 "
                                            "(Standard Methods 2340 B); the ±30 band is a lab setting"),
            ("tan_mg_l", None, 1.9, f"{EPA_AMMONIA}; general aquatic-life level, not planarian-specific"),
        ],
        "sources": {
            "temperature": f"{PLANARIAN}: 20 °C, kept dark",
            "feeding_interval_days": f"{PLANARIAN}: liver paste every 3-7 days (lab-specific); starve 7 days before experiments",
            "water_change_interval_days": "lab setting: full change of salts after each feeding",
            "water_change_fraction": LAB_SETTING,
            "census_interval_days": LAB_SETTING,
            "max_density_per_l": LAB_SETTING,
            "reserve_min_animals": LAB_SETTING,
            "check_interval_hours": "common practice: one check a day",
        },
        "notes": (
            "Kept in 1x Montjuïc salts (1.6 mM NaCl, 1.0 mM CaCl2, 1.0 mM MgSO4, 0.1 mM MgCl2, 0.1 mM KCl, "
            "1.2 mM NaHCO3) at 20 °C in the dark. No published pH, oxygen or stocking-density targets were "
            "found; set them as lab settings. Starve at least 7 days before experiments."
        ),
    },
    {
        "scientific_name": "Platynereis dumerilii",
        "common_name": "Marine ragworm",
        "habitat": "marine",
        "check_interval_hours": 24,
        "feeding_interval_days": 3,
        "water_change_interval_days": 7,
        "water_change_fraction": 0.5,
        "census_interval_days": 14,
        "max_density_per_l": 150,
        "reserve_min_animals": 40,
        "targets": [
            ("temp_c", 17.0, 19.0, f"{PLATYNEREIS}: 18 °C; the ±1 °C band is a lab setting"),
            ("salinity", 28.0, 32.0, f"{PLATYNEREIS}: 30 per mille (1:1 natural and artificial seawater); "
                                     "the ±2 band is a lab setting"),
        ],
        "sources": {
            "temperature": f"{PLATYNEREIS}: 18 °C",
            "light": f"{PLATYNEREIS}: 16 h light : 8 h dark, dim nocturnal light on 8 nights per lunar month",
            "salinity": f"{PLATYNEREIS}: 30 per mille",
            "feeding_interval_days": LAB_SETTING,
            "water_change_interval_days": LAB_SETTING,
            "water_change_fraction": LAB_SETTING,
            "census_interval_days": LAB_SETTING,
            "max_density_per_l": LAB_SETTING,
            "reserve_min_animals": LAB_SETTING,
            "check_interval_hours": "common practice: one check a day",
        },
        "notes": (
            "Marine polychaete kept at 18 °C in 30 per mille seawater with a 16:8 light cycle and a lunar "
            "'moonlight' cue for spawning. No published pH, oxygen, ammonia or density targets for "
            "cultures were found; those are lab settings."
        ),
    },
]

PROFILE_FIELDS = ("common_name", "habitat", "check_interval_hours", "feeding_interval_days",
                  "water_change_interval_days", "water_change_fraction", "census_interval_days",
                  "max_density_per_l", "reserve_min_animals", "notes", "sources")


def install(Species, CareTarget) -> int:
    """Create the default profiles that are missing (model classes passed in so migrations can use it)."""
    created = 0
    for profile in DEFAULT_PROFILES:
        species, made = Species.objects.get_or_create(
            scientific_name=profile["scientific_name"],
            defaults={field: profile[field] for field in PROFILE_FIELDS},
        )
        if made:
            created += 1
            for key, low, high, source in profile["targets"]:
                CareTarget.objects.create(species=species, parameter=key, low=low, high=high, source=source)
    return created
