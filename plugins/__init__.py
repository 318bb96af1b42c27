"""Built-in grainhabit plugins, in folders by topic along a frame's path (see DEVELOPERS.md, "Where does X live")."""
