"""Vocabulary of the invented demo scenario: a hobby-tutorial video site.

Six hobbies, each with four fine themes. Every theme has things to make, techniques, tools and
tags; titles and descriptions are assembled from several phrasings. All names are invented.
"""
from __future__ import annotations

# hobby -> theme -> (subjects, techniques, tools, tags)
THEMES: dict[str, dict[str, tuple[list[str], list[str], list[str], list[str]]]] = {
    "woodworking": {
        "hand-cut joinery": (
            ["dovetail box", "mortise and tenon frame", "finger joint tray", "bridle joint stool",
             "half-lap shelf", "sliding dovetail bookcase"],
            ["marking out with a knife", "paring to the line", "chopping mortises", "sawing tails",
             "fitting pins"],
            ["dovetail saw", "bench chisel", "marking gauge", "mallet", "shoulder plane"],
            ["joinery", "hand tools", "dovetails", "traditional woodwork"]),
        "wood turning": (
            ["spindle bowl", "maple pen", "wooden goblet", "lidded box", "walnut platter"],
            ["roughing a blank", "hollowing end grain", "sharpening a gouge", "sanding on the lathe"],
            ["wood lathe", "bowl gouge", "skew chisel", "parting tool", "chuck"],
            ["woodturning", "lathe", "bowls", "pens"]),
        "furniture finishing": (
            ["oak dining table", "pine dresser", "cherry side table", "antique chair"],
            ["applying oil finish", "french polishing", "stripping old varnish", "spraying lacquer",
             "filling grain"],
            ["shellac", "card scraper", "finishing oil", "random orbit sander", "spray gun"],
            ["finishing", "refinishing", "varnish", "restoration"]),
        "whittling and carving": (
            ["spoon", "bird figurine", "walking stick", "chip carved coaster", "relief panel"],
            ["carving with the grain", "push cuts", "chip carving", "stop cuts"],
            ["carving knife", "hook knife", "basswood", "strop", "gouges"],
            ["whittling", "spoon carving", "green wood", "knife skills"]),
    },
    "home cooking": {
        "sourdough baking": (
            ["country loaf", "sourdough focaccia", "rye sourdough", "sourdough bagels", "baguette"],
            ["feeding a starter", "stretch and fold", "shaping a boule", "scoring the dough",
             "cold retard proofing"],
            ["dutch oven", "banneton", "bench scraper", "lame", "levain"],
            ["sourdough", "bread", "baking", "starter"]),
        "fermentation": (
            ["kimchi", "sauerkraut", "kombucha", "hot sauce", "miso"],
            ["lacto fermenting", "brining vegetables", "second ferment", "burping jars"],
            ["fermentation crock", "airlock lid", "glass weights", "scoby", "salt brine"],
            ["fermenting", "probiotic", "pickles", "preserving"]),
        "cake decorating": (
            ["layer cake", "drip cake", "buttercream flowers", "fondant figure", "wedding cake tier"],
            ["crumb coating", "piping rosettes", "smoothing buttercream", "tempering chocolate"],
            ["piping bag", "offset spatula", "turntable", "fondant", "food colouring"],
            ["cake", "frosting", "dessert", "pastry art"]),
        "knife skills": (
            ["onion", "julienne carrots", "herb chiffonade", "whole chicken", "brunoise"],
            ["the claw grip", "rocking cut", "honing an edge", "whetstone sharpening"],
            ["chef knife", "whetstone", "honing steel", "cutting board", "paring knife"],
            ["knives", "prep", "kitchen basics", "sharpening"]),
    },
    "textile crafts": {
        "knitting": (
            ["cable sweater", "wool beanie", "lace shawl", "ribbed socks", "baby blanket"],
            ["casting on", "purl stitch", "picking up stitches", "blocking lace", "knitting in the round"],
            ["circular needles", "merino yarn", "stitch markers", "cable needle", "swatch"],
            ["knitting", "yarn", "knit patterns", "wool"]),
        "crochet": (
            ["granny square", "amigurumi bear", "crochet tote bag", "market bag", "chunky blanket"],
            ["magic ring", "double crochet", "chain stitch", "joining squares", "reading charts"],
            ["crochet hook", "cotton yarn", "stitch counter", "yarn needle"],
            ["crochet", "amigurumi", "hooking", "yarn crafts"]),
        "machine sewing": (
            ["linen dress", "tote bag", "zip pouch", "button-up shirt", "quilted cushion"],
            ["threading the machine", "sewing a french seam", "inserting a zipper", "grading seams",
             "pattern drafting"],
            ["sewing machine", "rotary cutter", "serger", "pinking shears", "walking foot"],
            ["sewing", "dressmaking", "patterns", "fabric"]),
        "embroidery": (
            ["floral hoop art", "monogram napkin", "sashiko mending", "cross stitch sampler"],
            ["satin stitch", "french knots", "back stitch", "transferring a pattern"],
            ["embroidery hoop", "stranded floss", "needle minder", "water soluble pen"],
            ["embroidery", "stitching", "needlework", "hoop art"]),
    },
    "gardening": {
        "vegetable growing": (
            ["tomato bed", "raised bed garlic", "runner beans", "salad greens", "winter squash"],
            ["sowing seeds indoors", "transplanting seedlings", "succession planting", "crop rotation"],
            ["raised bed", "seed trays", "drip irrigation", "garden fork", "cloche"],
            ["vegetables", "allotment", "grow your own", "kitchen garden"]),
        "houseplants": (
            ["monstera", "fiddle leaf fig", "pothos", "calathea", "snake plant"],
            ["repotting", "propagating cuttings in water", "misting and humidity", "root pruning"],
            ["terracotta pot", "grow light", "moisture meter", "perlite", "aroid mix"],
            ["houseplants", "indoor jungle", "plant care", "urban jungle"]),
        "bonsai": (
            ["juniper bonsai", "maple bonsai", "ficus bonsai", "pine bonsai", "forest planting"],
            ["wiring branches", "pinching new growth", "root reduction", "styling a nursery tree"],
            ["concave cutter", "bonsai wire", "akadama", "training pot"],
            ["bonsai", "miniature trees", "styling", "japanese gardening"]),
        "composting": (
            ["hot compost heap", "worm bin", "leaf mould", "bokashi bucket"],
            ["balancing greens and browns", "turning the heap", "harvesting castings"],
            ["compost bin", "compost thermometer", "pitchfork", "worm farm"],
            ["compost", "soil health", "zero waste", "organic gardening"]),
    },
    "music making": {
        "fingerstyle guitar": (
            ["travis picking pattern", "folk ballad arrangement", "blues turnaround", "harmonics etude"],
            ["alternating bass", "fingerpicking", "thumb independence", "open tunings"],
            ["acoustic guitar", "capo", "thumb pick", "nylon strings"],
            ["guitar", "fingerstyle", "acoustic", "guitar lesson"]),
        "home recording": (
            ["vocal take", "podcast voice", "drum mix", "acoustic demo", "lo-fi beat"],
            ["gain staging", "compressing vocals", "mixing with eq", "treating a room"],
            ["audio interface", "condenser microphone", "studio monitors", "pop filter", "daw"],
            ["recording", "mixing", "home studio", "audio production"]),
        "piano basics": (
            ["first waltz", "c major scale", "chord inversions", "simple ballad", "left hand pattern"],
            ["hand position", "sight reading", "pedalling", "playing hands together"],
            ["digital piano", "metronome", "sustain pedal", "method book"],
            ["piano", "keyboard", "piano lesson", "music theory"]),
        "hand drumming": (
            ["djembe groove", "cajon rhythm", "bongo pattern", "frame drum piece"],
            ["bass tone and slap", "keeping time", "polyrhythms", "rudiments on hand drums"],
            ["djembe", "cajon", "bongos", "frame drum"],
            ["drumming", "percussion", "rhythm", "hand drums"]),
    },
    "visual arts": {
        "watercolor painting": (
            ["loose floral", "misty landscape", "seascape", "botanical study", "night sky"],
            ["wet on wet", "glazing layers", "lifting pigment", "mixing greens"],
            ["round brush", "cold press paper", "masking fluid", "pan paints"],
            ["watercolor", "painting", "watercolour", "art tutorial"]),
        "calligraphy": (
            ["copperplate alphabet", "brush lettering quote", "gothic blackletter", "wedding envelope"],
            ["thick and thin strokes", "spacing letters", "flourishing", "drills for consistency"],
            ["pointed nib", "oblique holder", "brush pen", "sumi ink", "guide sheets"],
            ["calligraphy", "lettering", "handwriting", "penmanship"]),
        "pottery wheel": (
            ["stoneware mug", "porcelain bowl", "bud vase", "dinner plate", "teapot"],
            ["centering clay", "pulling walls", "trimming a foot ring", "glazing bisqueware"],
            ["pottery wheel", "kiln", "trimming tool", "stoneware clay", "glaze"],
            ["pottery", "ceramics", "wheel throwing", "clay"]),
        "pencil sketching": (
            ["portrait", "urban sketch", "still life", "animal study", "hands and feet"],
            ["hatching and cross hatching", "blocking proportions", "value studies", "blending graphite"],
            ["graphite pencils", "kneaded eraser", "sketchbook", "blending stump"],
            ["drawing", "sketching", "pencil art", "sketchbook"]),
    },
}

TITLE_FORMS = [
    "How to make a {subject}",
    "{subject_c} for complete beginners",
    "Beginner's guide to {technique}",
    "{n} mistakes to avoid when {technique}",
    "Making a {subject} with only a {tool}",
    "Is the {tool} worth it? Honest review",
    "{technique_c}: the one trick that changed everything",
    "My {subject} process, start to finish",
    "Weekend project: {subject}",
    "{technique_c} explained slowly",
]
DESCRIPTION_FORMS = [
    "In this video we make a {subject} step by step. We cover {technique} and {technique2}, "
    "using a {tool} and a {tool2}.",
    "A relaxed tutorial on {technique}. Tools: {tool}, {tool2}. Project: {subject}.",
    "Follow along as I work on a {subject}. Tips on {technique2} and choosing a {tool}.",
    "Everything I wish I knew about {technique} when I started, with a {subject} as the example.",
]
OFF_TOPIC_TITLES = [
    "Channel update and what is coming next", "Studio tour {year}", "Live Q&A replay",
    "Giveaway winners announced", "Why I took a break", "Answering your comments",
    "Behind the scenes of filming", "My morning routine", "Thank you for {n}k subscribers",
]
OFF_TOPIC_DESCRIPTIONS = [
    "A quick chat about the channel, upcoming videos and a thank you to everyone watching.",
    "No tutorial today, just a catch-up and your questions answered.",
]
OFF_TOPIC_TAGS = ["vlog", "channel news", "update", "community"]
